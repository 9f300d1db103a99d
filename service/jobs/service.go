package jobs

import (
	"bytes"
	"context"
	"encoding/base64"
	"errors"
	"fmt"
	"log/slog"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
)

// Service is the job service: it validates and stores models, turns queries
// into jobs, hands their work to workers (RunOnce), merges what workers
// commit and publishes partial and final results. It knows nothing of
// transports or backends: everything shared lives in the Store, so any
// number of Service values in any number of processes may share one store.
// A Service is safe for concurrent use.
type Service struct {
	store  Store
	cfg    Config
	obs    Observer
	log    *slog.Logger
	now    func() time.Time
	runner *infer.Runner // method choice, exact engines, MPE, synchronous queries
	unitRn *infer.Runner // exact and Gibbs work units (partial results every PartialEvery)

	nets  lru[*model.Network] // compiled networks by model name and hash
	plans lru[*plan]          // resolved jobs by job ID
	fair  *fairQueue          // whose work RunOnce claims next (fair.go)

	// hookUnit, when set by a test, runs in the goroutine of a work unit
	// before it computes.
	hookUnit func(j *Job, block int64)
}

// NewService returns a Service over store. obs may be nil (no metrics).
// The configuration is validated after defaults; a *ConfigError names the
// field at fault.
func NewService(store Store, cfg Config, obs Observer) (*Service, error) {
	if store == nil {
		return nil, fmt.Errorf("jobs: %w: Store is nil", ErrBadConfig)
	}
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	cfg = cfg.withDefaults()
	if obs == nil {
		obs = NopObserver{}
	}
	s := &Service{
		store: store, cfg: cfg, obs: obs, log: cfg.Logger, now: cfg.Clock,
		runner: infer.NewRunner(infer.Options{ExactMaxEntries: cfg.ExactMaxEntries}),
		unitRn: infer.NewRunner(infer.Options{ExactMaxEntries: cfg.ExactMaxEntries, ProgressEvery: cfg.PartialEvery}),
		nets:   newLRU[*model.Network](64),
		plans:  newLRU[*plan](256),
	}
	s.fair = newFairQueue(s.shareOf)
	return s, nil
}

// Config returns the configuration in force (defaults filled in).
func (s *Service) Config() Config { return s.cfg }

// Ready reports whether the store is reachable.
func (s *Service) Ready(ctx context.Context) error {
	if err := s.store.Ping(ctx); err != nil {
		return fmt.Errorf("ready: %w", err)
	}
	return nil
}

// MaxModelNameLen bounds model names.
const MaxModelNameLen = 128

// checkModelName accepts names of letters, digits, '.', '_' and '-'.
func checkModelName(name string) error {
	if name == "" {
		return fmt.Errorf("%w: the model has no name (set \"name\" in the document)", model.ErrInvalid)
	}
	if len(name) > MaxModelNameLen {
		return fmt.Errorf("%w: model name of %d bytes exceeds %d", model.ErrInvalid, len(name), MaxModelNameLen)
	}
	for _, r := range name {
		ok := r >= 'a' && r <= 'z' || r >= 'A' && r <= 'Z' || r >= '0' && r <= '9' || r == '.' || r == '_' || r == '-'
		if !ok {
			return fmt.Errorf("%w: model name %q may hold only letters, digits, '.', '_' and '-'", model.ErrInvalid, name)
		}
	}
	return nil
}

// PutModel validates and stores a model document (JSON) as the next
// version of its name in the caller's tenant, unless the latest version
// has the same content hash, in which case that version is returned with
// created == false. A document over the tenant's model-size quota fails
// with ErrQuotaExceeded.
func (s *Service) PutModel(ctx context.Context, doc []byte) (ModelInfo, bool, error) {
	p := principal(ctx)
	if err := s.checkModelQuota(p, len(doc)); err != nil {
		return ModelInfo{}, false, fmt.Errorf("put model: %w", err)
	}
	if int64(len(doc)) > s.cfg.MaxModelBytes {
		return ModelInfo{}, false, fmt.Errorf("put model: %w: document of %d bytes exceeds the limit of %d", model.ErrTooLarge, len(doc), s.cfg.MaxModelBytes)
	}
	d, err := model.Decode(bytes.NewReader(doc), s.cfg.MaxModelBytes)
	if err != nil {
		return ModelInfo{}, false, fmt.Errorf("put model: %w", err)
	}
	if err := checkModelName(d.Name); err != nil {
		return ModelInfo{}, false, fmt.Errorf("put model: %w", err)
	}
	net, err := model.Compile(d, s.cfg.Limits)
	if err != nil {
		return ModelInfo{}, false, fmt.Errorf("put model %q: %w", d.Name, err)
	}
	info := ModelInfo{Name: storeModelName(p.Tenant, d.Name), Hash: net.Hash, Variables: len(net.Vars), Bytes: len(doc), CreatedAt: s.now()}
	stored, created, err := s.store.PutModel(ctx, info, doc)
	if err != nil {
		return ModelInfo{}, false, fmt.Errorf("put model %q: %w", d.Name, err)
	}
	s.nets.put(netKey(stored.Name, stored.Hash), net)
	if created {
		s.log.Info("model stored", "tenant", p.Tenant, "model", d.Name, "version", stored.Version, "variables", stored.Variables, "bytes", stored.Bytes)
	}
	stored.Name = d.Name
	return stored, created, nil
}

// ParseModelRef splits "name" or "name@version" (version >= 1; 0 for the
// latest).
func ParseModelRef(ref string) (name string, version int, err error) {
	name, v, found := strings.Cut(ref, "@")
	if name == "" {
		return "", 0, fmt.Errorf("%w: no model named (want \"name\" or \"name@version\")", infer.ErrBadQuery)
	}
	if !found {
		return name, 0, nil
	}
	version, err = strconv.Atoi(v)
	if err != nil || version < 1 {
		return "", 0, fmt.Errorf("%w: model reference %q: version %q is not a positive integer", infer.ErrBadQuery, ref, v)
	}
	return name, version, nil
}

// GetModel returns a stored model version of the caller's tenant and its
// document; ref is "name" (the latest version) or "name@version".
func (s *Service) GetModel(ctx context.Context, ref string) (ModelInfo, []byte, error) {
	name, version, err := ParseModelRef(ref)
	if err != nil {
		return ModelInfo{}, nil, fmt.Errorf("get model: %w", err)
	}
	p := principal(ctx)
	stored, ok := p.storeName(name)
	if !ok {
		return ModelInfo{}, nil, errModelNotFound("get model", ref)
	}
	info, doc, err := s.store.GetModel(ctx, stored, version)
	if errors.Is(err, ErrNotFound) {
		return ModelInfo{}, nil, errModelNotFound("get model", ref)
	}
	if err != nil {
		return ModelInfo{}, nil, fmt.Errorf("get model %q: %w", ref, err)
	}
	info.Name = p.displayName(info.Name)
	return info, doc, nil
}

// ListModels returns the latest version of each model of the caller's
// tenant (of every tenant for an admin), in name order, a page at a time.
// pageToken is "" for the first page, else the token the previous page
// returned; the returned token is "" after the last page.
func (s *Service) ListModels(ctx context.Context, pageToken string, pageSize int) ([]ModelInfo, string, error) {
	after, err := decodeToken(pageToken)
	if err != nil {
		return nil, "", fmt.Errorf("list models: %w", err)
	}
	p := principal(ctx)
	// A member's models are one contiguous run of store names (scope.go);
	// its page tokens hold names without the tenant.
	switch {
	case p.Admin:
	case after != "":
		after = storeModelName(p.Tenant, after)
	case p.Tenant != "":
		after = storeModelName(p.Tenant, "")
	}
	size := pageSizeOf(pageSize)
	infos, err := s.store.ListModels(ctx, after, size+1)
	if err != nil {
		return nil, "", fmt.Errorf("list models: %w", err)
	}
	for i, info := range infos {
		if owner, _ := modelOwner(info.Name); !p.visible(owner) {
			infos = infos[:i]
			break
		}
	}
	next := ""
	if len(infos) > size {
		infos = infos[:size]
		next = infos[size-1].Name
		if !p.Admin {
			_, next = modelOwner(next)
		}
		next = encodeToken(next)
	}
	for i := range infos {
		infos[i].Name = p.displayName(infos[i].Name)
	}
	return infos, next, nil
}

// DeleteModel removes every version of a model. Jobs already submitted on
// it fail when a worker can no longer load it.
func (s *Service) DeleteModel(ctx context.Context, name string) error {
	p := principal(ctx)
	stored, ok := p.storeName(name)
	if !ok {
		return errModelNotFound("delete model", name)
	}
	err := s.store.DeleteModel(ctx, stored)
	if errors.Is(err, ErrNotFound) {
		return errModelNotFound("delete model", name)
	}
	if err != nil {
		return fmt.Errorf("delete model %q: %w", name, err)
	}
	owner, plain := modelOwner(stored)
	s.log.Info("model deleted", "tenant", owner, "model", plain)
	return nil
}

// network returns the compiled network of a stored model version, from
// the cache or the store.
func (s *Service) network(ctx context.Context, info ModelInfo) (*model.Network, error) {
	key := netKey(info.Name, info.Hash)
	if net, ok := s.nets.get(key); ok {
		return net, nil
	}
	stored, doc, err := s.store.GetModel(ctx, info.Name, info.Version)
	if err != nil {
		return nil, fmt.Errorf("model %s@%d: %w", info.Name, info.Version, err)
	}
	if info.Hash != "" && stored.Hash != info.Hash {
		return nil, fmt.Errorf("model %s@%d: %w: stored content hash %.12s differs from %.12s", info.Name, info.Version, ErrNotFound, stored.Hash, info.Hash)
	}
	d, err := model.Decode(bytes.NewReader(doc), 0)
	if err != nil {
		return nil, fmt.Errorf("model %s@%d: %w", info.Name, info.Version, err)
	}
	net, err := model.Compile(d, s.cfg.Limits)
	if err != nil {
		return nil, fmt.Errorf("model %s@%d: %w", info.Name, info.Version, err)
	}
	s.nets.put(netKey(stored.Name, stored.Hash), net)
	return net, nil
}

// resolveModel looks up a model reference of the caller and compiles it.
// The info returned has the name as the caller gives it.
func (s *Service) resolveModel(ctx context.Context, ref string) (ModelInfo, *model.Network, error) {
	name, version, err := ParseModelRef(ref)
	if err != nil {
		return ModelInfo{}, nil, err
	}
	p := principal(ctx)
	stored, ok := p.storeName(name)
	if !ok {
		return ModelInfo{}, nil, errModelNotFound("model", ref)
	}
	info, doc, err := s.store.GetModel(ctx, stored, version)
	if errors.Is(err, ErrNotFound) {
		return ModelInfo{}, nil, errModelNotFound("model", ref)
	}
	if err != nil {
		return ModelInfo{}, nil, fmt.Errorf("model %q: %w", ref, err)
	}
	key := netKey(info.Name, info.Hash)
	info.Name = p.displayName(info.Name)
	if net, ok := s.nets.get(key); ok {
		return info, net, nil
	}
	d, err := model.Decode(bytes.NewReader(doc), 0)
	if err != nil {
		return ModelInfo{}, nil, fmt.Errorf("model %q: %w", ref, err)
	}
	net, err := model.Compile(d, s.cfg.Limits)
	if err != nil {
		return ModelInfo{}, nil, fmt.Errorf("model %q: %w", ref, err)
	}
	s.nets.put(key, net)
	return info, net, nil
}

func netKey(name, hash string) string { return name + "\x00" + hash }

// Query answers q synchronously in this process, under ctx's deadline (and
// at most Config.MaxJobTime). Samplers end early with their partial
// result when ctx ends.
func (s *Service) Query(ctx context.Context, q *infer.Query) (*infer.Result, error) {
	if q == nil {
		return nil, fmt.Errorf("query: %w: no query", infer.ErrBadQuery)
	}
	qc := *q
	if err := qc.Validate(); err != nil {
		return nil, fmt.Errorf("query: %w", err)
	}
	if err := s.limitSamples(principal(ctx), &qc.Stop); err != nil {
		return nil, fmt.Errorf("query: %w", err)
	}
	_, net, err := s.resolveModel(ctx, qc.Model)
	if err != nil {
		return nil, fmt.Errorf("query: %w", err)
	}
	if _, ok := ctx.Deadline(); !ok {
		var cancel context.CancelFunc
		ctx, cancel = context.WithTimeout(ctx, s.cfg.MaxJobTime)
		defer cancel()
	}
	res, err := s.runner.Run(ctx, net, &qc, nil)
	if err != nil {
		return nil, fmt.Errorf("query: %w", wrapRunError(err))
	}
	return res, nil
}

// wrapRunError marks sampler errors about the query as ErrBadQuery, so
// that transports map them to invalid-argument.
func wrapRunError(err error) error {
	if errors.Is(err, sampling.ErrEvidenceNotSupported) || errors.Is(err, sampling.ErrUnknownMethod) || errors.Is(err, sampling.ErrTooLarge) {
		if !errors.Is(err, infer.ErrBadQuery) {
			return fmt.Errorf("%w: %w", infer.ErrBadQuery, err)
		}
	}
	return err
}

// Page tokens are opaque to clients: the base64 of the last key of a page.
func encodeToken(key string) string { return base64.RawURLEncoding.EncodeToString([]byte(key)) }

func decodeToken(tok string) (string, error) {
	if tok == "" {
		return "", nil
	}
	b, err := base64.RawURLEncoding.DecodeString(tok)
	if err != nil || len(b) == 0 {
		return "", fmt.Errorf("%w: page token %q is not one this service returned", infer.ErrBadQuery, tok)
	}
	return string(b), nil
}

func pageSizeOf(n int) int {
	if n <= 0 {
		return DefaultPageSize
	}
	return min(n, MaxPageSize)
}

// lru is a small bounded map that evicts its least recently used entry.
type lru[V any] struct {
	mu    sync.Mutex
	max   int
	tick  uint64
	items map[string]*lruItem[V]
}

type lruItem[V any] struct {
	v    V
	used uint64
}

func newLRU[V any](max int) lru[V] {
	return lru[V]{max: max, items: make(map[string]*lruItem[V], max)}
}

func (c *lru[V]) get(k string) (V, bool) {
	c.mu.Lock()
	defer c.mu.Unlock()
	it, ok := c.items[k]
	if !ok {
		var zero V
		return zero, false
	}
	c.tick++
	it.used = c.tick
	return it.v, true
}

func (c *lru[V]) put(k string, v V) {
	c.mu.Lock()
	defer c.mu.Unlock()
	c.tick++
	if it, ok := c.items[k]; ok {
		it.v, it.used = v, c.tick
		return
	}
	if len(c.items) >= c.max {
		oldest, ok := "", false
		var least uint64
		for key, it := range c.items {
			if !ok || it.used < least {
				oldest, least, ok = key, it.used, true
			}
		}
		delete(c.items, oldest)
	}
	c.items[k] = &lruItem[V]{v: v, used: c.tick}
}

func (c *lru[V]) drop(k string) {
	c.mu.Lock()
	defer c.mu.Unlock()
	delete(c.items, k)
}
