package standing

import (
	"bytes"
	"context"
	crand "crypto/rand"
	"encoding/binary"
	"encoding/hex"
	"errors"
	"fmt"
	"hash/fnv"
	"log/slog"
	"maps"
	"slices"
	"strings"
	"sync"
	"time"

	"github.com/beliefd/beliefd/service/exact"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/model"
)

// Defaults and bounds of Config and Spec.
const (
	DefaultMaxQueries     = 100
	DefaultMaxSeries      = 256
	DefaultInterval       = time.Minute
	DefaultMinInterval    = time.Second
	MaxInterval           = 24 * time.Hour
	DefaultTick           = time.Second
	DefaultComputeTimeout = 30 * time.Second
	DefaultLeaseMargin    = 15 * time.Second
	MaxTargets            = 32
	MaxIDLen              = 64
	maxUpdateRetries      = 5
	completeTimeout       = 5 * time.Second
	waitPoll              = 20 * time.Millisecond
	networkCache          = 16
)

// Recompute outcomes reported to the Observer.
const (
	// OutcomeKept: a result was computed and kept.
	OutcomeKept = "kept"
	// OutcomeSuperseded: a result was computed but the store already had
	// one for a newer revision (or a later one for the same revision).
	OutcomeSuperseded = "superseded"
	// OutcomeFailed: the recompute failed; the failure is recorded.
	OutcomeFailed = "failed"
)

// Engine resolves models and answers queries; *jobs.Service implements it.
type Engine interface {
	// GetModel returns a model version and its document; ref is "name" or "name@version".
	GetModel(ctx context.Context, ref string) (jobs.ModelInfo, []byte, error)
	// Query answers a query synchronously under ctx's deadline.
	Query(ctx context.Context, q *infer.Query) (*infer.Result, error)
}

// Observer is told about recomputes; api/metrics implements it.
type Observer interface {
	// Recomputed reports one recompute: its outcome (OutcomeKept,
	// OutcomeSuperseded or OutcomeFailed) and how long it took.
	Recomputed(outcome string, d time.Duration)
}

// Config configures a Service. Zero fields take the defaults.
type Config struct {
	// MaxQueries bounds the standing queries of all tenants; default 100.
	MaxQueries int
	// MaxSeries bounds the target states of one standing query (the
	// series of each posterior gauge it adds); default 256.
	MaxSeries int
	// DefaultInterval is the recompute interval of a Spec without one;
	// default 1m.
	DefaultInterval time.Duration
	// MinInterval is the shortest interval a Spec may ask for; default 1s.
	MinInterval time.Duration
	// Tick is how often Run reads the store, refreshes the snapshot and
	// looks for due recomputes; default 1s. A change made through this
	// Service is looked at at once.
	Tick time.Duration
	// ComputeTimeout bounds one recompute (and the stop.timeout a Spec may
	// give); default 30s.
	ComputeTimeout time.Duration
	// LeaseTime is the recompute lease; default ComputeTimeout + 15s.
	LeaseTime time.Duration
	// Limits bound the model documents compiled to check specs and
	// updates; they should be the job service's (model.DefaultLimits for
	// zero fields).
	Limits model.Limits
	// Owner names this process in leases; default a random name.
	Owner string
	// Clock is the time source of records, intervals and leases; default time.Now.
	Clock func() time.Time
	// Logger receives recompute failures and store trouble; default slog.Default().
	Logger *slog.Logger
	// Observer, when set, is told about every recompute.
	Observer Observer
}

func (c Config) withDefaults() (Config, error) {
	if c.MaxQueries == 0 {
		c.MaxQueries = DefaultMaxQueries
	}
	if c.MaxSeries == 0 {
		c.MaxSeries = DefaultMaxSeries
	}
	if c.DefaultInterval == 0 {
		c.DefaultInterval = DefaultInterval
	}
	if c.MinInterval == 0 {
		c.MinInterval = DefaultMinInterval
	}
	if c.Tick == 0 {
		c.Tick = DefaultTick
	}
	if c.ComputeTimeout == 0 {
		c.ComputeTimeout = DefaultComputeTimeout
	}
	if c.LeaseTime == 0 {
		c.LeaseTime = c.ComputeTimeout + DefaultLeaseMargin
	}
	if c.Owner == "" {
		var b [8]byte
		_, _ = crand.Read(b[:])
		c.Owner = "standing-" + hex.EncodeToString(b[:])
	}
	if c.Clock == nil {
		c.Clock = time.Now
	}
	if c.Logger == nil {
		c.Logger = slog.Default()
	}
	bad := func(field, format string, a ...any) error {
		return fmt.Errorf("standing: bad configuration: %s %s", field, fmt.Sprintf(format, a...))
	}
	switch {
	case c.MaxQueries < 0:
		return c, bad("MaxQueries", "= %d must be positive", c.MaxQueries)
	case c.MaxSeries < 0:
		return c, bad("MaxSeries", "= %d must be positive", c.MaxSeries)
	case c.MinInterval < 0:
		return c, bad("MinInterval", "= %s must be positive", c.MinInterval)
	case c.DefaultInterval < c.MinInterval || c.DefaultInterval > MaxInterval:
		return c, bad("DefaultInterval", "= %s must be between MinInterval (%s) and %s", c.DefaultInterval, c.MinInterval, MaxInterval)
	case c.Tick < 0:
		return c, bad("Tick", "= %s must be positive", c.Tick)
	case c.ComputeTimeout < 0:
		return c, bad("ComputeTimeout", "= %s must be positive", c.ComputeTimeout)
	case c.LeaseTime <= c.ComputeTimeout:
		return c, bad("LeaseTime", "= %s must exceed ComputeTimeout (%s), or a lease could end mid-recompute", c.LeaseTime, c.ComputeTimeout)
	}
	return c, nil
}

// Service registers standing queries, takes evidence updates, recomputes
// due answers (Run) and keeps a snapshot of every standing query for the
// gauges. Any number of Services in any number of processes may share one
// Store. It is safe for concurrent use.
type Service struct {
	store Store
	eng   Engine
	cfg   Config
	log   *slog.Logger
	now   func() time.Time
	kick  chan struct{}

	netMu sync.Mutex
	nets  map[string]*model.Network // compiled models by content hash

	snapMu sync.Mutex
	snap   map[Key]*Record
	order  []Key
}

// New returns a Service over store that answers with eng.
func New(store Store, eng Engine, cfg Config) (*Service, error) {
	if store == nil || eng == nil {
		return nil, errors.New("standing: store and engine are required")
	}
	cfg, err := cfg.withDefaults()
	if err != nil {
		return nil, err
	}
	return &Service{
		store: store, eng: eng, cfg: cfg, log: cfg.Logger, now: cfg.Clock,
		kick: make(chan struct{}, 1), nets: map[string]*model.Network{}, snap: map[Key]*Record{},
	}, nil
}

// Config returns the configuration in force (defaults filled in).
func (s *Service) Config() Config { return s.cfg }

type tenantKey struct{}

// WithTenant returns ctx addressing the standing queries of tenant. Only
// an admin principal may address a tenant other than its own; for anyone
// else the other tenant's standing queries do not exist.
func WithTenant(ctx context.Context, tenant string) context.Context {
	return context.WithValue(ctx, tenantKey{}, tenant)
}

// scope returns the tenant ctx addresses and whether ctx may list every
// tenant (an admin that named no tenant). A non-admin naming another
// tenant gets ok == false.
func scope(ctx context.Context) (tenant string, all, ok bool) {
	p, _ := jobs.PrincipalFrom(ctx)
	named, has := ctx.Value(tenantKey{}).(string)
	switch {
	case !has:
		return p.Tenant, p.Admin, true
	case named == p.Tenant || p.Admin:
		return named, false, true
	}
	return named, false, false
}

// asOwner returns ctx acting as the tenant that owns key, so that model
// references resolve among that tenant's models (an admin may act on
// another tenant's standing query).
func asOwner(ctx context.Context, key Key) context.Context {
	return jobs.WithPrincipal(ctx, jobs.Principal{Tenant: key.Tenant})
}

func keyOf(ctx context.Context, id string) (Key, error) {
	t, _, ok := scope(ctx)
	k := Key{Tenant: t, ID: id}
	if !ok {
		return k, notFound(k)
	}
	return k, nil
}

// checkID accepts 1 to 64 letters, digits, '.', '_' and '-', starting
// with a letter or digit.
func checkID(id string) error {
	if id == "" || len(id) > MaxIDLen {
		return fmt.Errorf("%w: id %q must be 1 to %d characters", infer.ErrBadQuery, id, MaxIDLen)
	}
	for i, r := range id {
		alnum := r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9'
		if !alnum && (i == 0 || r != '.' && r != '_' && r != '-') {
			return fmt.Errorf("%w: id %q may hold only letters, digits, '.', '_' and '-', and must start with a letter or digit", infer.ErrBadQuery, id)
		}
	}
	return nil
}

// network returns the compiled network of a model reference.
func (s *Service) network(ctx context.Context, ref string) (*model.Network, error) {
	if _, _, err := jobs.ParseModelRef(ref); err != nil {
		return nil, err
	}
	info, doc, err := s.eng.GetModel(ctx, ref)
	if err != nil {
		return nil, err
	}
	s.netMu.Lock()
	net, ok := s.nets[info.Hash]
	s.netMu.Unlock()
	if ok {
		return net, nil
	}
	d, err := model.Decode(bytes.NewReader(doc), 0)
	if err != nil {
		return nil, fmt.Errorf("model %q: %w", ref, err)
	}
	if net, err = model.Compile(d, s.cfg.Limits); err != nil {
		return nil, fmt.Errorf("model %q: %w", ref, err)
	}
	s.netMu.Lock()
	if len(s.nets) >= networkCache {
		for k := range s.nets { // drop one at random
			delete(s.nets, k)
			break
		}
	}
	s.nets[info.Hash] = net
	s.netMu.Unlock()
	return net, nil
}

// checkSpec validates sp against its model and returns its interval. It
// fills sp.Method.
func (s *Service) checkSpec(ctx context.Context, sp *Spec) (time.Duration, error) {
	if err := checkID(sp.ID); err != nil {
		return 0, err
	}
	interval := s.cfg.DefaultInterval
	if sp.Interval != "" {
		d, err := time.ParseDuration(sp.Interval)
		if err != nil {
			return 0, fmt.Errorf("%w: interval %q is not a duration such as \"30s\" or \"5m\"", infer.ErrBadQuery, sp.Interval)
		}
		if d < s.cfg.MinInterval || d > MaxInterval {
			return 0, fmt.Errorf("%w: interval %s must be between %s and %s", infer.ErrBadQuery, d, s.cfg.MinInterval, MaxInterval)
		}
		interval = d
	}
	q := infer.Query{Method: sp.Method, Stop: sp.Stop}
	if err := q.Validate(); err != nil {
		return 0, err
	}
	sp.Method = q.Method
	stop, err := sp.Stop.Sampling()
	if err != nil {
		return 0, err
	}
	if stop.Timeout > s.cfg.ComputeTimeout {
		return 0, fmt.Errorf("%w: stop.timeout %s exceeds the recompute limit of %s", infer.ErrBadQuery, stop.Timeout, s.cfg.ComputeTimeout)
	}
	if len(sp.Targets) == 0 {
		return 0, fmt.Errorf("%w: a standing query names its targets (the variables whose posteriors are exported)", model.ErrBadEvidence)
	}
	if len(sp.Targets) > MaxTargets {
		return 0, fmt.Errorf("%w: %d targets exceed the limit of %d per standing query", model.ErrBadEvidence, len(sp.Targets), MaxTargets)
	}
	net, err := s.network(ctx, sp.Model)
	if err != nil {
		return 0, err
	}
	series := 0
	seen := map[string]bool{}
	for _, t := range sp.Targets {
		if seen[t] {
			return 0, fmt.Errorf("%w: target %q is named twice", model.ErrBadEvidence, t)
		}
		seen[t] = true
		v, ok := net.Index(t)
		if !ok {
			if _, err := net.ResolveTargets([]string{t}, nil); err != nil {
				return 0, err
			}
			return 0, fmt.Errorf("%w: unknown target variable %q", model.ErrBadEvidence, t)
		}
		series += net.Vars[v].Card()
	}
	if series > s.cfg.MaxSeries {
		return 0, fmt.Errorf("%w: the targets have %d states in all, over the limit of %d per standing query (each state is a gauge series)", model.ErrBadEvidence, series, s.cfg.MaxSeries)
	}
	if err := s.checkEvidence(ctx, net, sp, sp.Evidence, nil); err != nil {
		return 0, err
	}
	return interval, nil
}

// checkEvidence checks that ev (and the variables cleared) fit the model
// and that ev does not have probability zero. The last is decided by exact
// inference where the model allows it; where it does not, a recompute
// reports it.
func (s *Service) checkEvidence(ctx context.Context, net *model.Network, sp *Spec, ev map[string]string, cleared []string) error {
	for _, v := range cleared {
		if _, ok := net.Index(v); !ok {
			if _, err := net.ResolveEvidence(map[string]string{v: ""}, nil); err != nil {
				return fmt.Errorf("clear: %w", err)
			}
			return fmt.Errorf("%w: clear: unknown variable %q", model.ErrBadEvidence, v)
		}
	}
	if _, err := net.ResolveEvidence(ev, nil); err != nil {
		return err
	}
	if len(ev) == 0 {
		return nil
	}
	cctx, cancel := context.WithTimeout(ctx, s.cfg.ComputeTimeout)
	defer cancel()
	_, err := s.eng.Query(cctx, &infer.Query{Model: sp.Model, Evidence: ev, Targets: sp.Targets[:1], Method: infer.MethodExact})
	switch {
	case err == nil, errors.Is(err, exact.ErrTooCostly):
		return nil
	case errors.Is(err, exact.ErrZeroEvidence):
		return fmt.Errorf("evidence %s is impossible under model %q: %w", evidenceString(ev), sp.Model, err)
	}
	return err
}

func evidenceString(ev map[string]string) string {
	parts := make([]string, 0, len(ev))
	for _, k := range slices.Sorted(maps.Keys(ev)) {
		parts = append(parts, k+"="+ev[k])
	}
	return "{" + strings.Join(parts, ", ") + "}"
}

// Create registers a standing query for the caller's tenant.
func (s *Service) Create(ctx context.Context, spec *Spec) (*View, error) {
	if spec == nil {
		return nil, fmt.Errorf("create standing query: %w: no standing query given", infer.ErrBadQuery)
	}
	sp := *spec
	sp.Targets = slices.Clone(spec.Targets)
	sp.Evidence = maps.Clone(spec.Evidence)
	if sp.ID == "" {
		var b [6]byte
		_, _ = crand.Read(b[:])
		sp.ID = "sq-" + hex.EncodeToString(b[:])
	}
	key, err := keyOf(ctx, sp.ID)
	if err != nil {
		return nil, fmt.Errorf("create standing query: %w", err)
	}
	interval, err := s.checkSpec(asOwner(ctx, key), &sp)
	if err != nil {
		return nil, fmt.Errorf("create standing query %q: %w", sp.ID, err)
	}
	now := s.now()
	ev := maps.Clone(sp.Evidence)
	if ev == nil {
		ev = map[string]string{}
	}
	rec := &Record{Key: key, Spec: sp, Interval: interval, CreatedAt: now, Evidence: ev, Revision: 1, EvidenceAt: now}
	if err := s.store.Create(ctx, rec, s.cfg.MaxQueries); err != nil {
		return nil, fmt.Errorf("create standing query %q: %w", sp.ID, err)
	}
	s.remember(rec)
	s.Kick()
	s.log.Info("standing query registered", "standing_query", key.String(), "model", sp.Model, "targets", len(sp.Targets))
	return NewView(rec, now), nil
}

// Get returns a standing query of the caller's tenant.
func (s *Service) Get(ctx context.Context, id string) (*View, error) {
	key, err := keyOf(ctx, id)
	if err != nil {
		return nil, fmt.Errorf("get standing query: %w", err)
	}
	rec, err := s.store.Get(ctx, key)
	if err != nil {
		return nil, fmt.Errorf("get standing query: %w", err)
	}
	return NewView(rec, s.now()), nil
}

// List returns the standing queries of the caller's tenant, oldest
// first; an admin that names no tenant gets every tenant's.
func (s *Service) List(ctx context.Context) ([]*View, error) {
	tenant, all, ok := scope(ctx)
	if !ok {
		return []*View{}, nil
	}
	recs, err := s.store.List(ctx)
	if err != nil {
		return nil, fmt.Errorf("list standing queries: %w", err)
	}
	now := s.now()
	out := make([]*View, 0, len(recs))
	for _, r := range recs {
		if all || r.Key.Tenant == tenant {
			out = append(out, NewView(r, now))
		}
	}
	return out, nil
}

// Delete removes a standing query of the caller's tenant; its gauges go
// at once from this process and within a Tick from the others.
func (s *Service) Delete(ctx context.Context, id string) error {
	key, err := keyOf(ctx, id)
	if err != nil {
		return fmt.Errorf("delete standing query: %w", err)
	}
	if err := s.store.Delete(ctx, key); err != nil {
		return fmt.Errorf("delete standing query: %w", err)
	}
	s.forget(key)
	s.log.Info("standing query deleted", "standing_query", key.String())
	return nil
}

// apply returns cur changed by u.
func apply(cur map[string]string, u *Update) map[string]string {
	next := map[string]string{}
	if !u.Replace {
		maps.Copy(next, cur)
		for _, v := range u.Clear {
			delete(next, v)
		}
	}
	maps.Copy(next, u.Set)
	return next
}

// UpdateEvidence applies u to the evidence of a standing query of the
// caller's tenant. When the evidence changes its revision goes up by one
// and a recompute is due at once; an update that changes nothing returns
// the standing query as it is.
func (s *Service) UpdateEvidence(ctx context.Context, id string, u *Update) (*View, error) {
	fail := func(err error) (*View, error) {
		return nil, fmt.Errorf("update evidence of standing query %q: %w", id, err)
	}
	if u == nil {
		return fail(fmt.Errorf("%w: no update given", infer.ErrBadQuery))
	}
	if u.Replace && len(u.Clear) > 0 {
		return fail(fmt.Errorf("%w: \"replace\" sets the evidence to \"set\" alone; \"clear\" has no meaning with it", infer.ErrBadQuery))
	}
	if u.ExpectRevision < 0 {
		return fail(fmt.Errorf("%w: expect_revision = %d must be positive", infer.ErrBadQuery, u.ExpectRevision))
	}
	for _, v := range u.Clear {
		if _, ok := u.Set[v]; ok {
			return fail(fmt.Errorf("%w: variable %q is both set and cleared", model.ErrBadEvidence, v))
		}
	}
	key, err := keyOf(ctx, id)
	if err != nil {
		return fail(err)
	}
	for range maxUpdateRetries {
		rec, err := s.store.Get(ctx, key)
		if err != nil {
			return fail(err)
		}
		if u.ExpectRevision != 0 && rec.Revision != u.ExpectRevision {
			return fail(fmt.Errorf("%w: the evidence is at revision %d, not %d", ErrRevisionMismatch, rec.Revision, u.ExpectRevision))
		}
		next := apply(rec.Evidence, u)
		octx := asOwner(ctx, key)
		net, err := s.network(octx, rec.Spec.Model)
		if err != nil {
			return fail(err)
		}
		if maps.Equal(next, rec.Evidence) {
			if err := s.checkEvidence(octx, net, &rec.Spec, nil, u.Clear); err != nil {
				return fail(err)
			}
			if _, err := net.ResolveEvidence(u.Set, nil); err != nil {
				return fail(err)
			}
			return NewView(rec, s.now()), nil
		}
		if err := s.checkEvidence(octx, net, &rec.Spec, next, u.Clear); err != nil {
			return fail(err)
		}
		updated, err := s.store.SetEvidence(ctx, key, rec.Revision, next, s.now())
		if errors.Is(err, ErrConflict) {
			if u.ExpectRevision != 0 {
				return fail(fmt.Errorf("%w: the evidence changed while this update was checked", ErrRevisionMismatch))
			}
			continue
		}
		if err != nil {
			return fail(err)
		}
		s.remember(updated)
		s.Kick()
		return NewView(updated, s.now()), nil
	}
	return fail(fmt.Errorf("%w: %d attempts", jobs.ErrConflict, maxUpdateRetries))
}

// Wait returns the standing query once an outcome (result or failure)
// answers at least the given revision, or as it is when timeout passes or
// ctx ends first.
func (s *Service) Wait(ctx context.Context, id string, revision int64, timeout time.Duration) (*View, error) {
	key, err := keyOf(ctx, id)
	if err != nil {
		return nil, fmt.Errorf("wait for standing query: %w", err)
	}
	deadline := time.NewTimer(timeout)
	defer deadline.Stop()
	tick := time.NewTicker(waitPoll)
	defer tick.Stop()
	for {
		rec, err := s.store.Get(ctx, key)
		if err != nil {
			return nil, fmt.Errorf("wait for standing query: %w", err)
		}
		last, _, _ := rec.lastAttempt()
		if last >= revision {
			return NewView(rec, s.now()), nil
		}
		select {
		case <-ctx.Done():
			return NewView(rec, s.now()), nil
		case <-deadline.C:
			return NewView(rec, s.now()), nil
		case <-tick.C:
		}
	}
}

// Kick makes Run look for due recomputes now rather than at its next tick.
func (s *Service) Kick() {
	select {
	case s.kick <- struct{}{}:
	default:
	}
}

// Run recomputes due standing queries and refreshes the snapshot every
// Tick, and at once after a change made through this Service, until ctx
// ends.
func (s *Service) Run(ctx context.Context) error {
	t := time.NewTicker(s.cfg.Tick)
	defer t.Stop()
	for {
		if _, err := s.Step(ctx); err != nil && ctx.Err() == nil {
			s.log.Warn("standing queries: cannot read the store", "err", err)
		}
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-t.C:
		case <-s.kick:
		}
	}
}

// Step reads every standing query from the store into the snapshot, then
// recomputes, one after another, those that are due and whose lease this
// Service gets. It returns how many it recomputed.
func (s *Service) Step(ctx context.Context) (int, error) {
	recs, err := s.store.List(ctx)
	if err != nil {
		return 0, err
	}
	s.setSnapshot(recs)
	n := 0
	for _, r := range recs {
		if ctx.Err() != nil {
			break
		}
		now := s.now()
		if !r.NeedsRecompute(now) {
			continue
		}
		claimed, err := s.store.Claim(ctx, r.Key, s.cfg.Owner, now, s.cfg.LeaseTime)
		if err != nil {
			if !errors.Is(err, jobs.ErrNotFound) && ctx.Err() == nil {
				s.log.Warn("standing query: claim failed", "standing_query", r.Key.String(), "err", err)
			}
			continue
		}
		if claimed == nil {
			continue
		}
		s.recompute(ctx, claimed)
		n++
	}
	return n, nil
}

// Seed returns the seed of a recompute of key at revision when the spec
// gives none: FNV-1a of the key mixed with the revision, 53 bits so that
// it stays exact in JSON numbers.
func Seed(key Key, revision int64) uint64 {
	h := fnv.New64a()
	h.Write([]byte(key.Tenant))
	h.Write([]byte{0})
	h.Write([]byte(key.ID))
	var b [8]byte
	binary.LittleEndian.PutUint64(b[:], uint64(revision))
	h.Write(b[:])
	return h.Sum64() >> 11
}

// recompute answers rec's evidence at rec's revision and completes the lease.
func (s *Service) recompute(ctx context.Context, rec *Record) {
	seed := Seed(rec.Key, rec.Revision)
	if rec.Spec.Seed != nil {
		seed = *rec.Spec.Seed
	}
	q := &infer.Query{Model: rec.Spec.Model, Evidence: maps.Clone(rec.Evidence), Targets: slices.Clone(rec.Spec.Targets),
		Method: rec.Spec.Method, Stop: rec.Spec.Stop, Seed: &seed}
	began := time.Now()
	qctx, cancel := context.WithTimeout(asOwner(ctx, rec.Key), s.cfg.ComputeTimeout)
	res, err := s.eng.Query(qctx, q)
	cancel()
	bg, cancelBg := context.WithTimeout(context.WithoutCancel(ctx), completeTimeout)
	defer cancelBg()
	if err != nil && ctx.Err() != nil {
		// Stopping: hand the lease back rather than record a failure.
		if rerr := s.store.Release(bg, rec.Key, s.cfg.Owner); rerr != nil {
			s.log.Warn("standing query: release failed", "standing_query", rec.Key.String(), "err", rerr)
		}
		return
	}
	out := &Outcome{Revision: rec.Revision, Evidence: rec.Evidence, At: s.now()}
	outcome := OutcomeKept
	if err != nil {
		if errors.Is(err, context.DeadlineExceeded) {
			err = fmt.Errorf("the recompute did not finish within %s: %w", s.cfg.ComputeTimeout, err)
		}
		out.Error = err.Error()
		outcome = OutcomeFailed
		s.log.Warn("standing query: recompute failed", "standing_query", rec.Key.String(), "revision", rec.Revision, "err", err)
	} else {
		out.Result = res
	}
	kept, err := s.store.Complete(bg, rec.Key, s.cfg.Owner, out)
	if err != nil {
		if !errors.Is(err, jobs.ErrNotFound) {
			s.log.Warn("standing query: storing the outcome failed", "standing_query", rec.Key.String(), "err", err)
		}
		return
	}
	if !kept && outcome == OutcomeKept {
		outcome = OutcomeSuperseded
	}
	if kept {
		s.snapMu.Lock()
		if r, ok := s.snap[rec.Key]; ok {
			r.Keep(out)
		}
		s.snapMu.Unlock()
	}
	if s.cfg.Observer != nil {
		s.cfg.Observer.Recomputed(outcome, time.Since(began))
	}
}

// Snapshot returns every tenant's standing queries as of the latest Step
// (and the changes this Service made since), oldest first, shaped at now:
// what the gauges export.
func (s *Service) Snapshot() []*View {
	now := s.now()
	s.snapMu.Lock()
	defer s.snapMu.Unlock()
	out := make([]*View, 0, len(s.order))
	for _, k := range s.order {
		if r, ok := s.snap[k]; ok {
			out = append(out, NewView(r, now))
		}
	}
	return out
}

func (s *Service) setSnapshot(recs []*Record) {
	s.snapMu.Lock()
	defer s.snapMu.Unlock()
	s.snap = make(map[Key]*Record, len(recs))
	s.order = s.order[:0]
	for _, r := range recs {
		s.snap[r.Key] = r
		s.order = append(s.order, r.Key)
	}
}

// remember puts a record this Service wrote into the snapshot.
func (s *Service) remember(r *Record) {
	c, err := r.clone()
	if err != nil {
		return
	}
	s.snapMu.Lock()
	defer s.snapMu.Unlock()
	if old, ok := s.snap[c.Key]; ok {
		// Keep the outcomes the snapshot knows; the record may predate them.
		for _, o := range []*Outcome{old.Result, old.Failure} {
			if o != nil {
				c.Keep(o)
			}
		}
	} else {
		s.order = append(s.order, c.Key)
	}
	s.snap[c.Key] = c
}

// forget drops a deleted record from the snapshot.
func (s *Service) forget(k Key) {
	s.snapMu.Lock()
	defer s.snapMu.Unlock()
	delete(s.snap, k)
	s.order = slices.DeleteFunc(s.order, func(o Key) bool { return o == k })
}
