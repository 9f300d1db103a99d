package jobs_test

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"math/rand/v2"
	"os"
	"sync"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/jobstest"
	"github.com/beliefd/beliefd/service/jobs/memstore"
	"github.com/beliefd/beliefd/service/model"
)

// recorder is an Observer that keeps what it is told.
type recorder struct {
	mu        sync.Mutex
	samples   map[string]int64
	outcomes  map[string]int
	submitted int
	finished  map[jobs.State]int
}

func newRecorder() *recorder {
	return &recorder{samples: map[string]int64{}, outcomes: map[string]int{}, finished: map[jobs.State]int{}}
}

func (r *recorder) SamplesDrawn(method string, n int64) {
	r.mu.Lock()
	defer r.mu.Unlock()
	r.samples[method] += n
}

func (r *recorder) BlockDone(_, outcome string, _ time.Duration) {
	r.mu.Lock()
	defer r.mu.Unlock()
	r.outcomes[outcome]++
}

func (r *recorder) JobSubmitted(string) {
	r.mu.Lock()
	defer r.mu.Unlock()
	r.submitted++
}

func (r *recorder) JobFinished(_ string, st jobs.State, _ time.Duration, _, _ float64) {
	r.mu.Lock()
	defer r.mu.Unlock()
	r.finished[st]++
}

func (r *recorder) outcome(o string) int {
	r.mu.Lock()
	defer r.mu.Unlock()
	return r.outcomes[o]
}

type env struct {
	t     *testing.T
	ctx   context.Context
	store *memstore.Store
	svc   *jobs.Service
	clock *jobstest.Clock // nil: real time
	obs   *recorder
}

// quietLogger drops logs; set BELIEFD_TEST_LOG to see them.
func quietLogger() *slog.Logger {
	if os.Getenv("BELIEFD_TEST_LOG") != "" {
		return slog.New(slog.NewTextHandler(os.Stderr, &slog.HandlerOptions{Level: slog.LevelDebug}))
	}
	return slog.New(slog.NewTextHandler(io.Discard, nil))
}

// newEnv builds a memory store and a service over it, with the
// chest-clinic model stored. clock may be nil for real time.
func newEnv(t *testing.T, cfg jobs.Config, clock *jobstest.Clock) *env {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	t.Cleanup(cancel)
	now := time.Now
	if clock != nil {
		now = clock.Now
	}
	st := memstore.New(memstore.Options{Clock: now})
	cfg.Clock = now
	if cfg.Logger == nil {
		cfg.Logger = quietLogger()
	}
	obs := newRecorder()
	svc, err := jobs.NewService(st, cfg, obs)
	if err != nil {
		t.Fatal(err)
	}
	e := &env{t: t, ctx: ctx, store: st, svc: svc, clock: clock, obs: obs}
	e.putDoc(testnets.ChestClinic())
	return e
}

func (e *env) putDoc(doc *model.Document) jobs.ModelInfo {
	e.t.Helper()
	data, err := json.Marshal(doc)
	if err != nil {
		e.t.Fatal(err)
	}
	info, _, err := e.svc.PutModel(e.ctx, data)
	if err != nil {
		e.t.Fatalf("PutModel(%s): %v", doc.Name, err)
	}
	return info
}

func (e *env) submit(q *infer.Query) *jobs.Job {
	e.t.Helper()
	j, created, err := e.svc.Submit(e.ctx, q)
	if err != nil || !created {
		e.t.Fatalf("Submit: created %v, %v", created, err)
	}
	return j
}

func (e *env) get(id string) *jobs.Job {
	e.t.Helper()
	j, err := e.svc.Get(e.ctx, id)
	if err != nil {
		e.t.Fatalf("Get(%s): %v", id, err)
	}
	return j
}

// runOnce runs one unit on worker w and fails the test on a store error.
func (e *env) runOnce(w string) bool {
	e.t.Helper()
	worked, err := e.svc.RunOnce(e.ctx, w)
	if err != nil {
		e.t.Fatalf("RunOnce(%s): %v", w, err)
	}
	return worked
}

// drain runs the job service's work on `workers` goroutines until job id
// is finished, and returns the finished job.
func (e *env) drain(id string, workers int) *jobs.Job {
	e.t.Helper()
	var wg sync.WaitGroup
	done := make(chan struct{})
	errs := make(chan error, workers)
	for w := range workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			name := fmt.Sprintf("drain-%d", w)
			for {
				select {
				case <-done:
					return
				default:
				}
				worked, err := e.svc.RunOnce(e.ctx, name)
				if err != nil {
					errs <- err
					return
				}
				if !worked {
					time.Sleep(time.Millisecond)
				}
			}
		}()
	}
	var j *jobs.Job
	jobstest.Eventually(e.t, 60*time.Second, "job "+id+" finishes", func() bool {
		j = e.get(id)
		return j.State.Terminal()
	})
	close(done)
	wg.Wait()
	close(errs)
	for err := range errs {
		e.t.Fatalf("RunOnce: %v", err)
	}
	return j
}

// reference answers q with infer.Runner, the engine behind `beliefd run`.
func reference(t *testing.T, doc *model.Document, q *infer.Query) *infer.Result {
	t.Helper()
	net := testnets.MustCompile(doc)
	qc := *q
	res, err := infer.NewRunner(infer.Options{Workers: 2}).Run(context.Background(), net, &qc, nil)
	if err != nil {
		t.Fatalf("reference run: %v", err)
	}
	return res
}

// canonical is the JSON of a result without its elapsed time and job
// state, keys sorted.
func canonical(t *testing.T, r *infer.Result, drop ...string) string {
	t.Helper()
	data, err := json.Marshal(r)
	if err != nil {
		t.Fatal(err)
	}
	var m map[string]any
	if err := json.Unmarshal(data, &m); err != nil {
		t.Fatal(err)
	}
	delete(m, "elapsed_seconds")
	delete(m, "state")
	for _, k := range drop {
		delete(m, k)
	}
	var buf bytes.Buffer
	enc := json.NewEncoder(&buf)
	enc.SetIndent("", " ")
	if err := enc.Encode(m); err != nil {
		t.Fatal(err)
	}
	return buf.String()
}

func sameResult(t *testing.T, got, want *infer.Result, drop ...string) {
	t.Helper()
	if got == nil {
		t.Fatalf("no result")
	}
	g, w := canonical(t, got, drop...), canonical(t, want, drop...)
	if g != w {
		t.Fatalf("job result differs from infer.Runner's:\n got %s\nwant %s", g, w)
	}
}

// randomDoc is a random network without zero entries, on which Gibbs
// sampling is irreducible.
func randomDoc() *model.Document {
	return testnets.Random(rand.New(rand.NewPCG(3, 5)), testnets.RandomOptions{Vars: 10, MaxParents: 2, MaxStates: 3})
}

func seed(v uint64) *uint64 { return &v }
