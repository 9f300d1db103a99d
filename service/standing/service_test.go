package standing_test

import (
	"context"
	"errors"
	"log/slog"
	"math"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/exact"
	"github.com/beliefd/beliefd/service/examples"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/memstore"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/standing"
	"github.com/beliefd/beliefd/service/standing/standingtest"
)

const example = "tarnwick-platform"

type clock struct {
	mu sync.Mutex
	t  time.Time
}

func (c *clock) now() time.Time          { c.mu.Lock(); defer c.mu.Unlock(); return c.t }
func (c *clock) advance(d time.Duration) { c.mu.Lock(); c.t = c.t.Add(d); c.mu.Unlock() }

// engine is the job service with a record of the recomputes it answers
// (queries with a seed; evidence checks carry none) and an optional gate
// that holds them.
type engine struct {
	*jobs.Service
	mu      sync.Mutex
	tenants []string
	gate    chan struct{}
	entered chan struct{}
}

func (e *engine) Query(ctx context.Context, q *infer.Query) (*infer.Result, error) {
	if q.Seed != nil {
		p, _ := jobs.PrincipalFrom(ctx)
		e.mu.Lock()
		e.tenants = append(e.tenants, p.Tenant)
		gate := e.gate
		e.mu.Unlock()
		if gate != nil {
			e.entered <- struct{}{}
			<-gate
		}
	}
	return e.Service.Query(ctx, q)
}

type observer struct {
	mu sync.Mutex
	n  map[string]int
}

func (o *observer) Recomputed(outcome string, d time.Duration) {
	o.mu.Lock()
	defer o.mu.Unlock()
	if o.n == nil {
		o.n = map[string]int{}
	}
	o.n[outcome]++
}

func (o *observer) count(outcome string) int { o.mu.Lock(); defer o.mu.Unlock(); return o.n[outcome] }

type fixture struct {
	store *standing.MemoryStore
	eng   *engine
	clk   *clock
	net   *model.Network
}

func newFixture(t *testing.T) *fixture {
	t.Helper()
	log := slog.New(slog.DiscardHandler)
	js, err := jobs.NewService(memstore.New(memstore.Options{}), jobs.Config{Logger: log}, nil)
	if err != nil {
		t.Fatal(err)
	}
	raw, err := examples.Raw(example)
	if err != nil {
		t.Fatal(err)
	}
	if _, _, err := js.PutModel(context.Background(), raw); err != nil {
		t.Fatal(err)
	}
	_, net, err := examples.Load(example)
	if err != nil {
		t.Fatal(err)
	}
	return &fixture{store: standing.NewMemoryStore(), eng: &engine{Service: js}, clk: &clock{t: time.Date(2026, 3, 1, 12, 0, 0, 0, time.UTC)}, net: net}
}

func (f *fixture) service(t *testing.T, owner string, obs standing.Observer, tweak func(*standing.Config)) *standing.Service {
	t.Helper()
	cfg := standing.Config{Owner: owner, Clock: f.clk.now, Logger: slog.New(slog.DiscardHandler), Observer: obs}
	if tweak != nil {
		tweak(&cfg)
	}
	s, err := standing.New(f.store, f.eng, cfg)
	if err != nil {
		t.Fatal(err)
	}
	return s
}

func step(t *testing.T, s *standing.Service, want int) {
	t.Helper()
	n, err := s.Step(context.Background())
	if err != nil {
		t.Fatal(err)
	}
	if n != want {
		t.Fatalf("step recomputed %d standing queries, want %d", n, want)
	}
}

// checkExact compares every target of v's result with brute-force
// enumeration of the joint (standingtest.Enumerate) on the evidence the
// result answers; exact results have zero-width intervals.
func (f *fixture) checkExact(t *testing.T, v *standing.View) {
	t.Helper()
	if v.Result == nil {
		t.Fatalf("%s has no result", v.ID)
	}
	if v.Result.Method != infer.MethodExact {
		t.Fatalf("method %s, want exact", v.Result.Method)
	}
	for _, target := range v.Targets {
		want, err := standingtest.Enumerate(f.net, v.ResultEvidence, target)
		if err != nil {
			t.Fatal(err)
		}
		for state, p := range want {
			iv := v.Result.Marginals[target][state]
			// Two sums of the same few hundred products in another order:
			// rounding differs in the last digits only.
			if math.Abs(iv.P-p) > 1e-12 || iv.Lo != iv.P || iv.Hi != iv.P {
				t.Errorf("P(%s=%s | %v) = %v [%v, %v], brute force %v", target, state, v.ResultEvidence, iv.P, iv.Lo, iv.Hi, p)
			}
		}
	}
}

// The power and network corner of the example model: its targets and
// alarms have 9 ancestors, few enough to enumerate.
func powerSpec(id string) *standing.Spec {
	return &standing.Spec{ID: id, Model: example, Targets: []string{"site_power", "utility_feed", "core_network"},
		Evidence: map[string]string{"alarm_power_bus": "firing"}, Interval: "1m"}
}

func TestRecomputeOnChange(t *testing.T) {
	f := newFixture(t)
	obs := &observer{}
	s := f.service(t, "p1", obs, nil)
	ctx := context.Background()
	v, err := s.Create(ctx, powerSpec("power"))
	if err != nil {
		t.Fatal(err)
	}
	if v.Revision != 1 || v.Status != standing.StatusPending || v.Result != nil {
		t.Fatalf("new standing query: %+v", v)
	}
	step(t, s, 1)
	v, err = s.Get(ctx, "power")
	if err != nil {
		t.Fatal(err)
	}
	if v.Status != standing.StatusCurrent || v.ResultRevision != 1 {
		t.Fatalf("after the first recompute: status %s, result revision %d", v.Status, v.ResultRevision)
	}
	f.checkExact(t, v)
	before := v.Result.Marginals["utility_feed"]["lost"].P

	v, err = s.UpdateEvidence(ctx, "power", &standing.Update{Set: map[string]string{"alarm_ups_on_battery": "firing"}})
	if err != nil {
		t.Fatal(err)
	}
	if v.Revision != 2 || v.Status != standing.StatusUpdating || v.ResultRevision != 1 {
		t.Fatalf("after an update: revision %d, status %s, result revision %d", v.Revision, v.Status, v.ResultRevision)
	}
	step(t, s, 1)
	v, _ = s.Get(ctx, "power")
	f.checkExact(t, v)
	if v.ResultRevision != 2 || v.ResultEvidence["alarm_ups_on_battery"] != "firing" {
		t.Fatalf("result answers revision %d, evidence %v", v.ResultRevision, v.ResultEvidence)
	}
	if after := v.Result.Marginals["utility_feed"]["lost"].P; after <= before {
		t.Errorf("the UPS-on-battery alarm did not raise P(utility_feed=lost): %v then %v", before, after)
	}

	// Clear one alarm: the other stays.
	v, err = s.UpdateEvidence(ctx, "power", &standing.Update{Clear: []string{"alarm_power_bus"}})
	if err != nil {
		t.Fatal(err)
	}
	if v.Revision != 3 || len(v.Evidence) != 1 || v.Evidence["alarm_ups_on_battery"] != "firing" {
		t.Fatalf("after clearing: revision %d, evidence %v", v.Revision, v.Evidence)
	}
	step(t, s, 1)
	v, _ = s.Get(ctx, "power")
	f.checkExact(t, v)

	// Repeating what is already there changes nothing and computes nothing.
	v, err = s.UpdateEvidence(ctx, "power", &standing.Update{Set: map[string]string{"alarm_ups_on_battery": "firing"}, Clear: []string{"alarm_power_bus"}})
	if err != nil {
		t.Fatal(err)
	}
	if v.Revision != 3 {
		t.Fatalf("an update that changes nothing moved the revision to %d", v.Revision)
	}
	step(t, s, 0)

	// Replace sets exactly the given evidence.
	v, err = s.UpdateEvidence(ctx, "power", &standing.Update{Replace: true, Set: map[string]string{"alarm_switch_ping": "firing"}, ExpectRevision: 3})
	if err != nil {
		t.Fatal(err)
	}
	if v.Revision != 4 || len(v.Evidence) != 1 || v.Evidence["alarm_switch_ping"] != "firing" {
		t.Fatalf("after replace: revision %d, evidence %v", v.Revision, v.Evidence)
	}
	step(t, s, 1)
	v, _ = s.Get(ctx, "power")
	f.checkExact(t, v)
	if obs.count(standing.OutcomeKept) != 4 {
		t.Fatalf("observer saw %v", obs.n)
	}
}

func TestIntervalRecompute(t *testing.T) {
	f := newFixture(t)
	obs := &observer{}
	s := f.service(t, "p1", obs, nil)
	ctx := context.Background()
	if _, err := s.Create(ctx, powerSpec("power")); err != nil { // interval 1m
		t.Fatal(err)
	}
	step(t, s, 1)
	first, _ := s.Get(ctx, "power")
	f.clk.advance(59 * time.Second)
	step(t, s, 0)
	f.clk.advance(time.Second)
	step(t, s, 1)
	v, _ := s.Get(ctx, "power")
	if v.ResultRevision != 1 || !v.ResultAt.Equal(first.ResultAt.Add(time.Minute)) {
		t.Fatalf("interval recompute: revision %d at %s, want revision 1 at %s", v.ResultRevision, v.ResultAt, first.ResultAt.Add(time.Minute))
	}
	if *v.ResultAgeSeconds != 0 {
		t.Fatalf("age %v right after a recompute", *v.ResultAgeSeconds)
	}
	f.clk.advance(30 * time.Second)
	v, _ = s.Get(ctx, "power")
	if *v.ResultAgeSeconds != 30 {
		t.Fatalf("age %v after 30s, want 30", *v.ResultAgeSeconds)
	}
	step(t, s, 0)
	if obs.count(standing.OutcomeKept) != 2 {
		t.Fatalf("observer saw %v, want 2 kept", obs.n)
	}
}

// Two processes on one store compute each revision once between them.
func TestComputedOnce(t *testing.T) {
	f := newFixture(t)
	obs := &observer{}
	a := f.service(t, "a", obs, nil)
	b := f.service(t, "b", obs, nil)
	ctx := context.Background()
	if _, err := a.Create(ctx, powerSpec("power")); err != nil {
		t.Fatal(err)
	}
	alarms := []string{"alarm_ups_on_battery", "alarm_switch_ping", "alarm_inlet_temp"}
	for i := range 6 {
		if i > 0 {
			state := "firing"
			if i > 3 {
				state = "quiet"
			}
			if _, err := b.UpdateEvidence(ctx, "power", &standing.Update{Set: map[string]string{alarms[i%3]: state}}); err != nil {
				t.Fatal(err)
			}
		}
		var wg sync.WaitGroup
		for _, s := range []*standing.Service{a, b, a, b} {
			wg.Add(1)
			go func() {
				defer wg.Done()
				if _, err := s.Step(ctx); err != nil {
					t.Error(err)
				}
			}()
		}
		wg.Wait()
		if got := obs.count(standing.OutcomeKept); got != i+1 {
			t.Fatalf("after %d revisions %d recomputes were kept (outcomes %v), want one per revision", i+1, got, obs.n)
		}
	}
	if obs.count(standing.OutcomeSuperseded) != 0 {
		t.Fatalf("a revision was computed twice: %v", obs.n)
	}
}

// A recompute that outlives its lease finishes after a newer revision was
// answered by another process: its result is dropped.
func TestLateResultNeverOverwrites(t *testing.T) {
	f := newFixture(t)
	obs := &observer{}
	a := f.service(t, "a", obs, nil)
	b := f.service(t, "b", obs, nil)
	ctx := context.Background()
	if _, err := a.Create(ctx, powerSpec("power")); err != nil {
		t.Fatal(err)
	}
	step(t, a, 1)
	if _, err := a.UpdateEvidence(ctx, "power", &standing.Update{Set: map[string]string{"alarm_ups_on_battery": "firing"}}); err != nil {
		t.Fatal(err)
	}
	gate := make(chan struct{})
	f.eng.mu.Lock()
	f.eng.gate, f.eng.entered = gate, make(chan struct{}, 1)
	f.eng.mu.Unlock()
	done := make(chan struct{})
	go func() { defer close(done); _, _ = a.Step(ctx) }()
	<-f.eng.entered // a computes revision 2 and is stuck
	f.eng.mu.Lock()
	f.eng.gate = nil
	f.eng.mu.Unlock()
	if _, err := b.UpdateEvidence(ctx, "power", &standing.Update{Set: map[string]string{"alarm_switch_ping": "firing"}}); err != nil {
		t.Fatal(err)
	}
	step(t, b, 0) // a's lease holds
	f.clk.advance(a.Config().LeaseTime)
	step(t, b, 1) // the lease has ended: b answers revision 3
	close(gate)
	<-done
	v, _ := b.Get(ctx, "power")
	if v.ResultRevision != 3 || v.Status != standing.StatusCurrent {
		t.Fatalf("result answers revision %d (status %s), want 3: a late result overwrote a newer one", v.ResultRevision, v.Status)
	}
	f.checkExact(t, v)
	if obs.count(standing.OutcomeSuperseded) != 1 || obs.count(standing.OutcomeKept) != 2 {
		t.Fatalf("outcomes %v, want 2 kept and 1 superseded", obs.n)
	}
}

func TestSampledResultCarriesInterval(t *testing.T) {
	f := newFixture(t)
	s := f.service(t, "p1", nil, nil)
	ctx := context.Background()
	sp := powerSpec("sampled")
	sp.Method = infer.MethodLikelihoodWeighting
	sp.Stop = infer.StopRule{MaxSamples: 50_000}
	if _, err := s.Create(ctx, sp); err != nil {
		t.Fatal(err)
	}
	step(t, s, 1)
	v, _ := s.Get(ctx, "sampled")
	r := v.Result
	if r == nil || r.Method != infer.MethodLikelihoodWeighting || r.Samples != 50_000 || r.EffectiveSamples <= 0 || r.EffectiveSamples > 50_000 {
		t.Fatalf("sampled result: %+v", r)
	}
	if r.Seed != standing.Seed(standing.Key{ID: "sampled"}, 1) {
		t.Fatalf("seed %d is not the one derived from the key and revision", r.Seed)
	}
	want, err := standingtest.Enumerate(f.net, v.ResultEvidence, "site_power")
	if err != nil {
		t.Fatal(err)
	}
	iv := r.Marginals["site_power"]["lost"]
	if !(iv.Lo < iv.P && iv.P < iv.Hi) {
		t.Fatalf("sampled interval [%v, %v] around %v has no width", iv.Lo, iv.Hi, iv.P)
	}
	// The 95% half-width is 1.96 standard errors; 5 standard errors is a
	// bound the estimate misses with probability below 1e-6 (normal tail).
	if se := (iv.Hi - iv.Lo) / 2 / 1.96; math.Abs(iv.P-want["lost"]) > 5*se {
		t.Fatalf("P(site_power=lost) = %v [%v, %v], brute force %v: more than 5 standard errors off", iv.P, iv.Lo, iv.Hi, want["lost"])
	}
}

func TestBadInput(t *testing.T) {
	f := newFixture(t)
	s := f.service(t, "p1", nil, func(c *standing.Config) { c.MaxQueries = 2; c.MaxSeries = 10 })
	ctx := context.Background()
	for _, tc := range []struct {
		name string
		spec standing.Spec
		is   error
		says string
	}{
		{"unknown evidence variable", standing.Spec{ID: "a", Model: example, Targets: []string{"bad_deploy"}, Evidence: map[string]string{"alarm_nope": "firing"}}, model.ErrBadEvidence, `"alarm_nope"`},
		{"unknown state", standing.Spec{ID: "a", Model: example, Targets: []string{"bad_deploy"}, Evidence: map[string]string{"alarm_canary": "loud"}}, model.ErrBadEvidence, `no state "loud"`},
		{"unknown target", standing.Spec{ID: "a", Model: example, Targets: []string{"bad_deploi"}}, model.ErrBadEvidence, `"bad_deploi"`},
		{"no targets", standing.Spec{ID: "a", Model: example}, model.ErrBadEvidence, "targets"},
		{"target twice", standing.Spec{ID: "a", Model: example, Targets: []string{"bad_deploy", "bad_deploy"}}, model.ErrBadEvidence, "twice"},
		{"too many series", standing.Spec{ID: "a", Model: example, Targets: []string{"storage", "orders_db", "checkout_api", "tracking_api"}}, model.ErrBadEvidence, "12 states"},
		{"impossible evidence", standing.Spec{ID: "a", Model: example, Targets: []string{"bad_deploy"}, Evidence: map[string]string{"site_power": "lost", "utility_feed": "ok"}}, exact.ErrZeroEvidence, "impossible"},
		{"unknown model", standing.Spec{ID: "a", Model: "nope", Targets: []string{"x"}}, jobs.ErrNotFound, `"nope"`},
		{"bad id", standing.Spec{ID: "a b", Model: example, Targets: []string{"bad_deploy"}}, infer.ErrBadQuery, `"a b"`},
		{"bad interval", standing.Spec{ID: "a", Model: example, Targets: []string{"bad_deploy"}, Interval: "10ms"}, infer.ErrBadQuery, "interval"},
		{"bad method", standing.Spec{ID: "a", Model: example, Targets: []string{"bad_deploy"}, Method: "guess"}, infer.ErrBadQuery, `"guess"`},
		{"timeout above the recompute limit", standing.Spec{ID: "a", Model: example, Targets: []string{"bad_deploy"}, Method: "likelihood-weighting", Stop: infer.StopRule{Timeout: "1h"}}, infer.ErrBadQuery, "stop.timeout"},
	} {
		_, err := s.Create(ctx, &tc.spec)
		if !errors.Is(err, tc.is) || !strings.Contains(err.Error(), tc.says) {
			t.Errorf("%s: err = %v; want %v naming %s", tc.name, err, tc.is, tc.says)
		}
	}
	if _, err := s.Create(ctx, powerSpec("one")); err != nil {
		t.Fatal(err)
	}
	if _, err := s.Create(ctx, powerSpec("one")); !errors.Is(err, standing.ErrExists) {
		t.Errorf("duplicate id: err = %v", err)
	}
	if _, err := s.Create(ctx, powerSpec("two")); err != nil {
		t.Fatal(err)
	}
	if _, err := s.Create(ctx, powerSpec("three")); !errors.Is(err, standing.ErrLimit) || !strings.Contains(err.Error(), "2 of 2") {
		t.Errorf("third with a limit of 2: err = %v", err)
	}
	for _, tc := range []struct {
		name string
		u    standing.Update
		is   error
		says string
	}{
		{"unknown variable", standing.Update{Set: map[string]string{"alarm_nope": "firing"}}, model.ErrBadEvidence, `"alarm_nope"`},
		{"unknown state", standing.Update{Set: map[string]string{"alarm_canary": "loud"}}, model.ErrBadEvidence, `"loud"`},
		{"clear unknown variable", standing.Update{Clear: []string{"alarm_nope"}}, model.ErrBadEvidence, `"alarm_nope"`},
		{"impossible", standing.Update{Set: map[string]string{"site_power": "lost", "utility_feed": "ok"}}, exact.ErrZeroEvidence, "site_power=lost"},
		{"set and clear", standing.Update{Set: map[string]string{"alarm_canary": "firing"}, Clear: []string{"alarm_canary"}}, model.ErrBadEvidence, "both set and cleared"},
		{"replace and clear", standing.Update{Replace: true, Clear: []string{"alarm_canary"}}, infer.ErrBadQuery, "replace"},
		{"stale revision", standing.Update{Set: map[string]string{"alarm_canary": "firing"}, ExpectRevision: 7}, standing.ErrRevisionMismatch, "revision 1, not 7"},
	} {
		_, err := s.UpdateEvidence(ctx, "one", &tc.u)
		if !errors.Is(err, tc.is) || !strings.Contains(err.Error(), tc.says) {
			t.Errorf("update %s: err = %v; want %v naming %s", tc.name, err, tc.is, tc.says)
		}
	}
	v, err := s.Get(ctx, "one")
	if err != nil || v.Revision != 1 {
		t.Fatalf("rejected updates changed the standing query: %+v, %v", v, err)
	}
	if _, err := s.UpdateEvidence(ctx, "missing", &standing.Update{}); !errors.Is(err, jobs.ErrNotFound) {
		t.Errorf("update of a missing standing query: err = %v", err)
	}
}

func TestTenants(t *testing.T) {
	f := newFixture(t)
	s := f.service(t, "p1", nil, nil)
	teal := jobs.WithPrincipal(context.Background(), jobs.Principal{Tenant: "teal"})
	plum := jobs.WithPrincipal(context.Background(), jobs.Principal{Tenant: "plum"})
	admin := jobs.WithPrincipal(context.Background(), jobs.Principal{Tenant: "ops", Admin: true})
	// Models are the tenants' own too.
	raw, _ := examples.Raw(example)
	for _, ctx := range []context.Context{teal, plum} {
		if _, _, err := f.eng.PutModel(ctx, raw); err != nil {
			t.Fatal(err)
		}
	}
	if _, err := s.Create(teal, powerSpec("x")); err != nil {
		t.Fatal(err)
	}
	notFound := func(what string, err error) {
		t.Helper()
		if !errors.Is(err, jobs.ErrNotFound) {
			t.Errorf("%s: err = %v, want not found", what, err)
		}
	}
	_, err := s.Get(plum, "x")
	notFound("get another tenant's", err)
	_, err = s.UpdateEvidence(plum, "x", &standing.Update{Clear: []string{"alarm_power_bus"}})
	notFound("update another tenant's", err)
	notFound("delete another tenant's", s.Delete(plum, "x"))
	_, err = s.Get(standing.WithTenant(plum, "teal"), "x")
	notFound("a non-admin naming another tenant", err)
	if l, err := s.List(plum); err != nil || len(l) != 0 {
		t.Fatalf("plum lists %d, %v", len(l), err)
	}
	if _, err := s.Create(plum, powerSpec("x")); err != nil {
		t.Fatalf("the same id in another tenant: %v", err)
	}
	if l, _ := s.List(teal); len(l) != 1 || l[0].Tenant != "teal" {
		t.Fatalf("teal lists %+v", l)
	}
	if l, _ := s.List(admin); len(l) != 2 {
		t.Fatalf("admin lists %d, want every tenant's 2", len(l))
	}
	if v, err := s.Get(standing.WithTenant(admin, "teal"), "x"); err != nil || v.Tenant != "teal" {
		t.Fatalf("admin addressing teal: %+v, %v", v, err)
	}
	// An admin acting on teal's standing query uses teal's models (the
	// admin's own tenant has none).
	if v, err := s.UpdateEvidence(standing.WithTenant(admin, "teal"), "x", &standing.Update{Set: map[string]string{"alarm_switch_ping": "firing"}}); err != nil || v.Revision != 2 {
		t.Fatalf("admin updating teal's: %+v, %v", v, err)
	}
	if _, err := s.Create(standing.WithTenant(admin, "teal"), powerSpec("by-admin")); err != nil {
		t.Fatalf("admin creating in teal: %v", err)
	}
	if err := s.Delete(standing.WithTenant(admin, "teal"), "by-admin"); err != nil {
		t.Fatal(err)
	}
	step(t, s, 2)
	f.eng.mu.Lock()
	got := strings.Join(f.eng.tenants, ",")
	f.eng.mu.Unlock()
	if got != "teal,plum" {
		t.Fatalf("recomputes ran as tenants %q, want teal,plum", got)
	}
	if err := s.Delete(teal, "x"); err != nil {
		t.Fatal(err)
	}
	if _, err := s.Get(plum, "x"); err != nil {
		t.Fatalf("deleting teal's removed plum's: %v", err)
	}
}

func TestSnapshotFollowsDeletes(t *testing.T) {
	f := newFixture(t)
	a := f.service(t, "a", nil, nil)
	b := f.service(t, "b", nil, nil)
	ctx := context.Background()
	for _, id := range []string{"one", "two"} {
		if _, err := a.Create(ctx, powerSpec(id)); err != nil {
			t.Fatal(err)
		}
	}
	step(t, a, 2)
	step(t, b, 0)
	if len(a.Snapshot()) != 2 || len(b.Snapshot()) != 2 {
		t.Fatalf("snapshots %d and %d, want 2", len(a.Snapshot()), len(b.Snapshot()))
	}
	if err := a.Delete(ctx, "one"); err != nil {
		t.Fatal(err)
	}
	if snap := a.Snapshot(); len(snap) != 1 || snap[0].ID != "two" {
		t.Fatalf("the deleting process still has %d", len(snap))
	}
	step(t, b, 0)
	if snap := b.Snapshot(); len(snap) != 1 || snap[0].ID != "two" || snap[0].Result == nil {
		t.Fatalf("another process after a step: %+v", snap)
	}
}

func TestWaitAndRun(t *testing.T) {
	f := newFixture(t)
	s := f.service(t, "p1", nil, func(c *standing.Config) { c.Tick = time.Hour }) // only kicks wake it
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- s.Run(ctx) }()
	defer func() {
		cancel()
		if err := <-done; !errors.Is(err, context.Canceled) {
			t.Errorf("run: %v", err)
		}
	}()
	v, err := s.Create(ctx, powerSpec("power"))
	if err != nil {
		t.Fatal(err)
	}
	v, err = s.Wait(ctx, "power", v.Revision, 10*time.Second)
	if err != nil || v.Status != standing.StatusCurrent {
		t.Fatalf("wait for revision 1: %+v, %v", v, err)
	}
	v, err = s.UpdateEvidence(ctx, "power", &standing.Update{Set: map[string]string{"alarm_switch_ping": "firing"}})
	if err != nil {
		t.Fatal(err)
	}
	v, err = s.Wait(ctx, "power", v.Revision, 10*time.Second)
	if err != nil || v.ResultRevision != 2 {
		t.Fatalf("wait for revision 2: %+v, %v", v, err)
	}
	f.checkExact(t, v)
	// A revision nobody computes: Wait gives up after its timeout.
	v, err = s.Wait(ctx, "power", 99, 50*time.Millisecond)
	if err != nil || v.ResultRevision != 2 {
		t.Fatalf("wait past its timeout: %+v, %v", v, err)
	}
}
