package worker_test

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"io"
	"log/slog"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/examples"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/jobstest"
	"github.com/beliefd/beliefd/service/jobs/memstore"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
	"github.com/beliefd/beliefd/worker"
)

const example = "tarnwick-platform" // invented demo model (service/examples)

// chain is a small model without zero entries, on which Gibbs sampling is
// irreducible (invented numbers: test data, not check values).
const chain = `{"name": "chain", "variables": [
 {"name": "a", "states": ["ok", "bad"], "table": [[0.7, 0.3]]},
 {"name": "b", "states": ["ok", "bad"], "parents": ["a"], "table": [[0.8, 0.2], [0.4, 0.6]]},
 {"name": "c", "states": ["ok", "bad"], "parents": ["b"], "table": [[0.9, 0.1], [0.3, 0.7]]}]}`

var quiet = slog.New(slog.NewTextHandler(io.Discard, nil))

type env struct {
	t     *testing.T
	ctx   context.Context
	store *memstore.Store
	svc   *jobs.Service
	obs   *outcomes
}

// outcomes counts block outcomes reported to the observer.
type outcomes struct {
	jobs.NopObserver
	mu sync.Mutex
	n  map[string]int
}

func (o *outcomes) BlockDone(_, outcome string, _ time.Duration) {
	o.mu.Lock()
	defer o.mu.Unlock()
	o.n[outcome]++
}

func (o *outcomes) count(outcome string) int {
	o.mu.Lock()
	defer o.mu.Unlock()
	return o.n[outcome]
}

func newEnv(t *testing.T, cfg jobs.Config, clock *jobstest.Clock) *env {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	t.Cleanup(cancel)
	now := time.Now
	if clock != nil {
		now = clock.Now
	}
	st := memstore.New(memstore.Options{Clock: now})
	cfg.Clock, cfg.Logger = now, quiet
	obs := &outcomes{n: map[string]int{}}
	svc, err := jobs.NewService(st, cfg, obs)
	if err != nil {
		t.Fatal(err)
	}
	raw, err := examples.Raw(example)
	if err != nil {
		t.Fatal(err)
	}
	for _, doc := range [][]byte{raw, []byte(chain)} {
		if _, _, err := svc.PutModel(ctx, doc); err != nil {
			t.Fatal(err)
		}
	}
	return &env{t: t, ctx: ctx, store: st, svc: svc, obs: obs}
}

// startPool runs a pool until the returned stop function is called; stop
// waits for Run to return.
func (e *env) startPool(cfg worker.Config) (stop func()) {
	e.t.Helper()
	cfg.Logger = quiet
	p, err := worker.NewPool(e.svc, e.store, cfg)
	if err != nil {
		e.t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(e.ctx)
	done := make(chan error, 1)
	go func() { done <- p.Run(ctx) }()
	var once sync.Once
	stop = func() {
		once.Do(func() {
			cancel()
			select {
			case err := <-done:
				if err != nil {
					e.t.Errorf("Run: %v", err)
				}
			case <-time.After(30 * time.Second):
				e.t.Fatalf("the pool did not stop")
			}
		})
	}
	e.t.Cleanup(stop)
	return stop
}

func (e *env) submit(q infer.Query) *jobs.Job {
	e.t.Helper()
	j, created, err := e.svc.Submit(e.ctx, &q)
	if err != nil || !created {
		e.t.Fatalf("Submit: %v", err)
	}
	return j
}

func (e *env) get(id string) *jobs.Job {
	e.t.Helper()
	j, err := e.svc.Get(e.ctx, id)
	if err != nil {
		e.t.Fatal(err)
	}
	return j
}

func (e *env) wait(id string) *jobs.Job {
	e.t.Helper()
	var j *jobs.Job
	jobstest.Eventually(e.t, 90*time.Second, "job "+id+" finishes", func() bool {
		j = e.get(id)
		return j.State.Terminal()
	})
	return j
}

// reference answers q with infer.Runner, the engine of `beliefd run`.
func reference(t *testing.T, name string, q infer.Query) *infer.Result {
	t.Helper()
	var data []byte
	if name == "chain" {
		data = []byte(chain)
	} else {
		var err error
		if data, err = examples.Raw(name); err != nil {
			t.Fatal(err)
		}
	}
	doc, err := model.Decode(bytes.NewReader(data), 0)
	if err != nil {
		t.Fatal(err)
	}
	net, err := model.Compile(doc, model.Limits{})
	if err != nil {
		t.Fatal(err)
	}
	res, err := infer.NewRunner(infer.Options{Workers: 2}).Run(context.Background(), net, &q, nil)
	if err != nil {
		t.Fatal(err)
	}
	return res
}

// sameResult compares result documents without elapsed time, job state and
// the named fields.
func sameResult(t *testing.T, got, want *infer.Result, drop ...string) {
	t.Helper()
	canon := func(r *infer.Result) string {
		data, _ := json.Marshal(r)
		var m map[string]any
		if err := json.Unmarshal(data, &m); err != nil {
			t.Fatal(err)
		}
		for _, k := range append(drop, "elapsed_seconds", "state") {
			delete(m, k)
		}
		out, _ := json.MarshalIndent(m, "", " ")
		return string(out)
	}
	if g, w := canon(got), canon(want); g != w {
		t.Fatalf("job result differs from infer.Runner's:\n got %s\nwant %s", g, w)
	}
}

func seed(v uint64) *uint64 { return &v }

// End to end in one process: memory store, job service, worker pool.
// Watchers see partial results arrive; the final result is bit for bit
// infer.Runner's, with 1 or 3 worker goroutines.
func TestPoolEndToEnd(t *testing.T) {
	for _, workers := range []int{1, 3} {
		t.Run(string(rune('0'+workers)), func(t *testing.T) {
			jobstest.CheckGoroutines(t)
			e := newEnv(t, jobs.Config{PartialEvery: time.Millisecond}, nil)
			q := infer.Query{Model: example, Method: infer.MethodLikelihoodWeighting,
				Evidence: map[string]string{"alarm_checkout_5xx": "firing", "alarm_canary": "firing"},
				Stop:     infer.StopRule{MaxSamples: 6 * sampling.DefaultBlockSize}, Seed: seed(101)}
			j := e.submit(q)
			ex := e.submit(infer.Query{Model: example, Method: infer.MethodExact, MPE: true, Evidence: q.Evidence})
			watch, err := e.svc.Watch(e.ctx, j.ID)
			if err != nil {
				t.Fatal(err)
			}
			e.startPool(worker.Config{Workers: workers})
			var partials []*infer.Result
			var last *jobs.Job
			for v := range watch {
				if v.Result != nil && v.Result.State != string(v.State) {
					t.Fatalf("result state %q in a %s job", v.Result.State, v.State)
				}
				if v.State == jobs.StateRunning && v.Result != nil {
					partials = append(partials, v.Result)
				}
				last = v
			}
			if last.State != jobs.StateSucceeded {
				t.Fatalf("job ended %s: %s", last.State, last.Error)
			}
			if len(partials) == 0 {
				t.Fatalf("no partial result was seen while the job ran")
			}
			for i, p := range partials {
				if p.StopReason != "" || p.Samples <= 0 || p.Samples >= last.Result.Samples || (i > 0 && p.Samples < partials[i-1].Samples) {
					t.Fatalf("partial result %d: %d samples, stop %q (final %d)", i, p.Samples, p.StopReason, last.Result.Samples)
				}
			}
			sameResult(t, last.Result, reference(t, example, q))
			exq := ex.Query
			sameResult(t, e.wait(ex.ID).Result, reference(t, example, exq))
		})
	}
}

// Cancelling a job reaches the unit that runs it: a Gibbs run of a billion
// sweeps stops, and the pool goes on to other work.
func TestPoolCancel(t *testing.T) {
	jobstest.CheckGoroutines(t)
	e := newEnv(t, jobs.Config{}, nil)
	e.startPool(worker.Config{Workers: 2, IdleMin: time.Millisecond, IdleMax: 10 * time.Millisecond})
	j := e.submit(infer.Query{Model: "chain", Method: infer.MethodGibbs, Stop: infer.StopRule{MaxSamples: 1 << 30}, Seed: seed(102)})
	jobstest.Eventually(t, 20*time.Second, "the job starts", func() bool { return e.get(j.ID).State == jobs.StateRunning })
	if _, err := e.svc.Cancel(e.ctx, j.ID); err != nil {
		t.Fatal(err)
	}
	jobstest.Eventually(t, 20*time.Second, "the unit stops", func() bool { return e.obs.count(jobs.OutcomeCancelled) == 1 })
	if got := e.get(j.ID); got.State != jobs.StateCancelled {
		t.Fatalf("state %s; want cancelled", got.State)
	}
	q := infer.Query{Model: example, Method: infer.MethodExact, Evidence: map[string]string{"alarm_inlet_temp": "firing"}}
	next := e.submit(q)
	sameResult(t, e.wait(next.ID).Result, reference(t, example, next.Query))
}

// A job's deadline (its stop timeout, on the service clock) ends it with
// the result of its merged blocks and stop reason "timeout".
func TestPoolDeadline(t *testing.T) {
	jobstest.CheckGoroutines(t)
	clock := jobstest.NewClock(time.Date(2031, 2, 3, 4, 5, 6, 0, time.UTC))
	e := newEnv(t, jobs.Config{}, clock)
	q := infer.Query{Model: example, Method: infer.MethodLikelihoodWeighting, Evidence: map[string]string{"alarm_switch_ping": "firing"},
		Stop: infer.StopRule{Timeout: "30s"}, Seed: seed(103)}
	j := e.submit(q)
	e.startPool(worker.Config{Workers: 2})
	jobstest.Eventually(t, 30*time.Second, "two blocks merge", func() bool { return e.get(j.ID).MergedBlocks >= 2 })
	clock.Advance(30 * time.Second)
	got := e.wait(j.ID)
	if got.State != jobs.StateSucceeded || got.Result.StopReason != sampling.ReasonTimeout {
		t.Fatalf("after the deadline: %s, stop %q", got.State, got.Result.StopReason)
	}
	if got.Result.Samples != got.MergedBlocks*sampling.DefaultBlockSize {
		t.Fatalf("%d samples from %d merged blocks", got.Result.Samples, got.MergedBlocks)
	}
	prefix := q
	prefix.Stop = infer.StopRule{MaxSamples: got.Result.Samples}
	sameResult(t, got.Result, reference(t, example, prefix), "stop_reason")
}

func TestPoolQueueFullAndIdempotency(t *testing.T) {
	jobstest.CheckGoroutines(t)
	e := newEnv(t, jobs.Config{MaxUnfinished: 1}, nil)
	q := infer.Query{Model: example, Method: infer.MethodExact, IdempotencyKey: "once"}
	j := e.submit(q)
	if _, _, err := e.svc.Submit(e.ctx, &infer.Query{Model: example}); !errors.Is(err, jobs.ErrQueueFull) {
		t.Fatalf("second job with MaxUnfinished 1: %v; want ErrQueueFull", err)
	}
	again, created, err := e.svc.Submit(e.ctx, &q)
	if err != nil || created || again.ID != j.ID {
		t.Fatalf("resubmission: %v created %v, %v; want job %s", again, created, err, j.ID)
	}
	e.startPool(worker.Config{Workers: 1})
	if got := e.wait(j.ID); got.State != jobs.StateSucceeded {
		t.Fatalf("job: %s %s", got.State, got.Error)
	}
	again, created, err = e.svc.Submit(e.ctx, &q)
	if err != nil || created || again.ID != j.ID || again.State != jobs.StateSucceeded {
		t.Fatalf("resubmission after the end: %v created %v, %v", again, created, err)
	}
}

// On shutdown the pool stops taking work; units in flight finish within
// the grace period or are handed back. Either way no block stays leased:
// with a clock that stands still (leases never run out) a second pool
// finishes the job, with the result infer.Runner gives.
func TestPoolShutdown(t *testing.T) {
	for _, tc := range []struct {
		name  string
		grace time.Duration
	}{{"finish", time.Minute}, {"hand back", time.Nanosecond}} {
		t.Run(tc.name, func(t *testing.T) {
			jobstest.CheckGoroutines(t)
			clock := jobstest.NewClock(time.Date(2031, 2, 3, 4, 5, 6, 0, time.UTC))
			e := newEnv(t, jobs.Config{LookAhead: 8}, clock)
			q := infer.Query{Model: "chain", Method: infer.MethodRejection, Evidence: map[string]string{"c": "bad"},
				Stop: infer.StopRule{MaxSamples: 100 * sampling.DefaultBlockSize}, Seed: seed(104)}
			j := e.submit(q)
			stop := e.startPool(worker.Config{Workers: 3, ShutdownGrace: tc.grace})
			jobstest.Eventually(t, 30*time.Second, "blocks merge", func() bool { return e.get(j.ID).MergedBlocks >= 3 })
			stop()
			if got := e.get(j.ID); got.State.Terminal() {
				t.Skipf("the job finished before the shutdown (%d blocks merged)", got.MergedBlocks)
			}
			e.startPool(worker.Config{Workers: 2})
			got := e.wait(j.ID)
			if got.State != jobs.StateSucceeded {
				t.Fatalf("job: %s %s", got.State, got.Error)
			}
			sameResult(t, got.Result, reference(t, "chain", q))
		})
	}
}

// fakeRunner counts calls; the first one panics.
type fakeRunner struct{ calls atomic.Int64 }

func (f *fakeRunner) RunOnce(context.Context, string) (bool, error) {
	if f.calls.Add(1) == 1 {
		panic("runner bug")
	}
	return false, nil
}

func TestPoolSurvivesPanic(t *testing.T) {
	jobstest.CheckGoroutines(t)
	f := &fakeRunner{}
	p, err := worker.NewPool(f, nil, worker.Config{Workers: 1, IdleMin: time.Millisecond, IdleMax: time.Millisecond, Logger: quiet})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- p.Run(ctx) }()
	jobstest.Eventually(t, 10*time.Second, "the pool goes on after a panic", func() bool { return f.calls.Load() >= 3 })
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	if err := p.Run(context.Background()); !errors.Is(err, worker.ErrBadConfig) {
		t.Fatalf("second Run: %v; want an error", err)
	}
}

// idleRunner never finds work and counts how often it looks.
type idleRunner struct{ calls atomic.Int64 }

func (f *idleRunner) RunOnce(context.Context, string) (bool, error) {
	f.calls.Add(1)
	return false, nil
}

// Idle goroutines wake on a queue notification, not only when their
// back-off (an hour here) runs out.
func TestPoolWakesOnNotify(t *testing.T) {
	jobstest.CheckGoroutines(t)
	st := memstore.New(memstore.Options{})
	f := &idleRunner{}
	p, err := worker.NewPool(f, st, worker.Config{Workers: 2, IdleMin: time.Hour, IdleMax: time.Hour, Logger: quiet})
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() { done <- p.Run(ctx) }()
	jobstest.Eventually(t, 10*time.Second, "both goroutines look once", func() bool { return f.calls.Load() == 2 })
	jobstest.Eventually(t, 10*time.Second, "a notification wakes both", func() bool {
		_ = st.Notify(ctx, jobs.TopicQueue)
		return f.calls.Load() >= 4
	})
	cancel()
	if err := <-done; err != nil {
		t.Fatal(err)
	}
}

func TestPoolConfig(t *testing.T) {
	for _, c := range []worker.Config{
		{Workers: -1},
		{IdleMin: time.Second, IdleMax: time.Millisecond},
		{ShutdownGrace: -time.Second},
		{IdleMin: -time.Second},
	} {
		if _, err := worker.NewPool(&idleRunner{}, nil, c); !errors.Is(err, worker.ErrBadConfig) {
			t.Errorf("NewPool(%+v) = %v; want ErrBadConfig", c, err)
		}
	}
	if _, err := worker.NewPool(nil, nil, worker.Config{}); !errors.Is(err, worker.ErrBadConfig) {
		t.Errorf("NewPool(nil runner) = %v", err)
	}
}
