package jobs_test

import (
	"context"
	"encoding/json"
	"errors"
	"math"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/exact"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/jobstest"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
	"github.com/beliefd/beliefd/service/sampling/gibbs"
)

// The final result of a job is bit for bit the result of infer.Runner
// (`beliefd run`) for the same query and seed, whatever the number of
// workers: blocks of sampling.DefaultBlockSize are merged in block order
// and the stopping rule is checked on every merged prefix.
func TestJobMatchesRunner(t *testing.T) {
	jobstest.CheckGoroutines(t)
	chest := testnets.ChestClinic()
	random := randomDoc()
	cases := []struct {
		name string
		doc  *model.Document
		q    infer.Query
		stop string // the stop reason the case is built to reach
	}{
		{"forward", chest, infer.Query{Method: infer.MethodForward, Stop: infer.StopRule{MaxSamples: 40_000}, Seed: seed(11)}, sampling.ReasonMaxSamples},
		{"rejection", chest, infer.Query{Method: infer.MethodRejection, Evidence: map[string]string{"xray": "yes"},
			Stop: infer.StopRule{MaxSamples: 60_000}, Seed: seed(12)}, sampling.ReasonMaxSamples},
		// A precision rule: the run stops at the first merged prefix that
		// meets it, while up to LookAhead later blocks may have been drawn.
		{"likelihood-weighting", chest, infer.Query{Method: infer.MethodLikelihoodWeighting,
			Evidence: map[string]string{"dysp": "yes"}, SoftEvidence: map[string][]float64{"xray": {0.3, 0.9}},
			Stop: infer.StopRule{AbsErr: 0.006, MaxSamples: 2_000_000}, Seed: seed(13)}, sampling.ReasonAbsErr},
		{"likelihood-weighting-mpe", chest, infer.Query{Method: infer.MethodLikelihoodWeighting, MPE: true,
			Evidence: map[string]string{"smoke": "yes"}, Targets: []string{"lung", "bronc"},
			Stop: infer.StopRule{RelErr: 0.05, Confidence: 0.9}, Seed: seed(14)}, sampling.ReasonRelErr},
		{"gibbs", random, infer.Query{Method: infer.MethodGibbs, Evidence: map[string]string{"v9": "s0"},
			Stop: infer.StopRule{MaxSamples: 8000}, Seed: seed(15)}, sampling.ReasonMaxSamples},
		{"exact", chest, infer.Query{Method: infer.MethodExact, MPE: true, Evidence: map[string]string{"asia": "yes", "xray": "yes"}}, sampling.ReasonExact},
		{"auto", chest, infer.Query{Evidence: map[string]string{"dysp": "yes"}, Seed: seed(16)}, sampling.ReasonExact},
	}
	for _, tc := range cases {
		for _, workers := range []int{1, 3} {
			t.Run(tc.name+"/"+string(rune('0'+workers)), func(t *testing.T) {
				e := newEnv(t, jobs.Config{}, nil)
				info := e.putDoc(tc.doc)
				q := tc.q
				q.Model = info.Name
				j := e.submit(&q)
				if q.Seed == nil {
					q.Seed = seed(j.Seed) // the job drew it; the reference uses it
				}
				done := e.drain(j.ID, workers)
				if done.State != jobs.StateSucceeded || done.Result == nil || done.Result.State != "succeeded" {
					t.Fatalf("job ended %s (%s), result state %v", done.State, done.Error, done.Result)
				}
				sameResult(t, done.Result, reference(t, tc.doc, &q))
				if done.Result.StopReason != tc.stop {
					t.Fatalf("stop reason %q; the case is meant to reach %q", done.Result.StopReason, tc.stop)
				}
				if done.Blockwise() && done.MergedBlocks != done.Merged.Blocks {
					t.Fatalf("merged_blocks %d but the merged statistics count %d blocks", done.MergedBlocks, done.Merged.Blocks)
				}
			})
		}
	}
}

// Published marginals of the chest-clinic network (Lauritzen &
// Spiegelhalter 1988, see testnets.ChestClinic): the exact job reproduces
// them, and a forward-sampling job lies within 4 standard errors of each
// (two-sided false-failure rate 6.3e-5 per check, from the normal tail).
func TestPublishedMarginals(t *testing.T) {
	e := newEnv(t, jobs.Config{}, nil)
	published := map[string]float64{"tub": 0.0104, "lung": 0.055, "bronc": 0.45, "either": 0.064828, "xray": 0.110290, "dysp": 0.435971}
	ex := e.drain(e.submit(&infer.Query{Model: "chest-clinic", Method: infer.MethodExact}).ID, 1)
	fw := e.drain(e.submit(&infer.Query{Model: "chest-clinic", Method: infer.MethodForward, Stop: infer.StopRule{MaxSamples: 50_000}, Seed: seed(21)}).ID, 2)
	for v, p := range published {
		// The paper prints 3 to 6 significant digits: round to them.
		if got := ex.Result.Marginals[v]["yes"].P; math.Abs(got-p) > 5e-7 && math.Abs(got-p) > 0.0005*p {
			t.Errorf("exact P(%s=yes) = %.6f; published %.6f", v, got, p)
		}
		n := float64(fw.Result.Samples)
		se := math.Sqrt(p * (1 - p) / n)
		if got := fw.Result.Marginals[v]["yes"].P; math.Abs(got-p) > 4*se {
			t.Errorf("forward P(%s=yes) = %.5f; published %.5f, more than 4 standard errors (%.5f) away", v, got, p, se)
		}
	}
	if fw.Result.Samples != 50_000 || fw.Result.StopReason != sampling.ReasonMaxSamples {
		t.Fatalf("forward job drew %d samples, stop %q; want 50000, max_samples", fw.Result.Samples, fw.Result.StopReason)
	}
}

// A running job shows a partial result after its first merged block, and
// then at most every PartialEvery on the service clock. The partial result
// after k blocks is the result of a run of k blocks, but for its stop reason.
func TestPartialResults(t *testing.T) {
	clock := jobstest.NewClock(time.Date(2031, 1, 1, 0, 0, 0, 0, time.UTC))
	e := newEnv(t, jobs.Config{PartialEvery: time.Second}, clock)
	q := infer.Query{Model: "chest-clinic", Method: infer.MethodLikelihoodWeighting, Evidence: map[string]string{"xray": "yes"},
		Stop: infer.StopRule{MaxSamples: 10 * sampling.DefaultBlockSize}, Seed: seed(31)}
	j := e.submit(&q)
	if j.State != jobs.StateQueued || j.Result != nil || j.Blocks != 10 || j.BlockSize != sampling.DefaultBlockSize {
		t.Fatalf("submitted job: state %s, blocks %d of %d, result %v", j.State, j.Blocks, j.BlockSize, j.Result)
	}
	e.runOnce("w")
	got := e.get(j.ID)
	if got.State != jobs.StateRunning || got.Result == nil || got.Result.State != "running" || got.Result.StopReason != "" {
		t.Fatalf("after one block: state %s, result %+v", got.State, got.Result)
	}
	prefix := q
	prefix.Stop.MaxSamples = sampling.DefaultBlockSize
	sameResult(t, got.Result, reference(t, testnets.ChestClinic(), &prefix), "stop_reason")

	e.runOnce("w") // the clock stands still: no new partial result
	if r := e.get(j.ID).Result; r.Samples != sampling.DefaultBlockSize {
		t.Fatalf("partial result rewritten within PartialEvery: %d samples", r.Samples)
	}
	clock.Advance(time.Second)
	e.runOnce("w")
	got = e.get(j.ID)
	if got.MergedBlocks != 3 || got.Result.Samples != 3*sampling.DefaultBlockSize {
		t.Fatalf("after PartialEvery: merged %d blocks, partial result of %d samples; want 3 blocks", got.MergedBlocks, got.Result.Samples)
	}
	if !got.Deadline.Equal(got.StartedAt.Add(jobs.DefaultMaxJobTime)) {
		t.Fatalf("deadline %v; want start %v + %v", got.Deadline, got.StartedAt, jobs.DefaultMaxJobTime)
	}
}

func TestSubmitValidation(t *testing.T) {
	e := newEnv(t, jobs.Config{}, nil)
	e.putDoc(randomDoc())
	cases := []struct {
		name string
		q    infer.Query
		want error
	}{
		{"unknown model", infer.Query{Model: "nosuch"}, jobs.ErrNotFound},
		{"unknown version", infer.Query{Model: "chest-clinic@7"}, jobs.ErrNotFound},
		{"bad version", infer.Query{Model: "chest-clinic@x"}, infer.ErrBadQuery},
		{"unknown variable", infer.Query{Model: "chest-clinic", Evidence: map[string]string{"fever": "yes"}}, model.ErrBadEvidence},
		{"unknown state", infer.Query{Model: "chest-clinic", Evidence: map[string]string{"xray": "maybe"}}, model.ErrBadEvidence},
		{"unknown target", infer.Query{Model: "chest-clinic", Targets: []string{"fever"}}, model.ErrBadEvidence},
		{"bad soft evidence", infer.Query{Model: "chest-clinic", SoftEvidence: map[string][]float64{"xray": {1}}}, model.ErrBadEvidence},
		{"unknown method", infer.Query{Model: "chest-clinic", Method: "magic"}, infer.ErrBadQuery},
		{"bad stop", infer.Query{Model: "chest-clinic", Stop: infer.StopRule{AbsErr: 2}}, sampling.ErrBadStop},
		{"bad timeout", infer.Query{Model: "chest-clinic", Stop: infer.StopRule{Timeout: "soon"}}, infer.ErrBadQuery},
		{"bad priority", infer.Query{Model: "chest-clinic", Priority: "urgent"}, infer.ErrBadQuery},
		{"forward with evidence", infer.Query{Model: "chest-clinic", Method: infer.MethodForward, Evidence: map[string]string{"xray": "yes"}}, infer.ErrBadQuery},
		// The any-of gate "either" has zero entries: single-site Gibbs
		// sampling cannot move between its states.
		{"gibbs reducible", infer.Query{Model: "chest-clinic", Method: infer.MethodGibbs}, gibbs.ErrReducible},
		{"gibbs too few samples", infer.Query{Model: "random-10", Method: infer.MethodGibbs, Stop: infer.StopRule{MaxSamples: 20}}, sampling.ErrBadStop},
		{"long idempotency key", infer.Query{Model: "chest-clinic", IdempotencyKey: strings.Repeat("k", 300)}, infer.ErrBadQuery},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			_, _, err := e.svc.Submit(e.ctx, &tc.q)
			if !errors.Is(err, tc.want) {
				t.Fatalf("Submit error = %v; want %v", err, tc.want)
			}
		})
	}
	if _, _, err := e.svc.Submit(e.ctx, nil); !errors.Is(err, infer.ErrBadQuery) {
		t.Fatalf("Submit(nil) = %v; want ErrBadQuery", err)
	}
	js, _, err := e.svc.List(e.ctx, "", 10)
	if err != nil || len(js) != 0 {
		t.Fatalf("refused queries left %d jobs, %v", len(js), err)
	}
	// MPE needs exact inference: refused when the junction tree is too large.
	small := newEnv(t, jobs.Config{ExactMaxEntries: 10}, nil)
	_, _, err = small.svc.Submit(small.ctx, &infer.Query{Model: "chest-clinic", Method: infer.MethodLikelihoodWeighting, MPE: true})
	if !errors.Is(err, exact.ErrTooCostly) {
		t.Fatalf("MPE beyond the exact limit: %v; want ErrTooCostly", err)
	}
	// "auto" falls back to likelihood weighting there.
	j := small.submit(&infer.Query{Model: "chest-clinic"})
	if j.Method != infer.MethodLikelihoodWeighting || !strings.HasPrefix(j.MethodReason, "auto:") {
		t.Fatalf("auto beyond the exact limit chose %s (%s)", j.Method, j.MethodReason)
	}
}

func TestQueueFullAndIdempotency(t *testing.T) {
	e := newEnv(t, jobs.Config{MaxUnfinished: 2}, nil)
	q := infer.Query{Model: "chest-clinic", Method: infer.MethodExact, IdempotencyKey: "retry-me"}
	a := e.submit(&q)
	again, created, err := e.svc.Submit(e.ctx, &q)
	if err != nil || created || again.ID != a.ID {
		t.Fatalf("resubmission with the same key = %v created %v, %v; want job %s", again, created, err, a.ID)
	}
	e.submit(&infer.Query{Model: "chest-clinic", Method: infer.MethodExact})
	_, _, err = e.svc.Submit(e.ctx, &infer.Query{Model: "chest-clinic", Method: infer.MethodExact})
	if !errors.Is(err, jobs.ErrQueueFull) {
		t.Fatalf("third job with MaxUnfinished 2: %v; want ErrQueueFull", err)
	}
	// The key still finds its job on a full queue.
	if again, _, err := e.svc.Submit(e.ctx, &q); err != nil || again.ID != a.ID {
		t.Fatalf("resubmission on a full queue: %v", err)
	}
	e.drain(a.ID, 1)
	if _, created, err := e.svc.Submit(e.ctx, &infer.Query{Model: "chest-clinic", Method: infer.MethodExact}); err != nil || !created {
		t.Fatalf("submission after a job finished: %v", err)
	}
}

// Cancel ends a job at once with the result of the blocks merged so far;
// its blocks are dropped and no worker takes it up again.
func TestCancel(t *testing.T) {
	jobstest.CheckGoroutines(t)
	clock := jobstest.NewClock(time.Date(2031, 1, 1, 0, 0, 0, 0, time.UTC))
	e := newEnv(t, jobs.Config{}, clock)
	q := infer.Query{Model: "chest-clinic", Method: infer.MethodLikelihoodWeighting, Evidence: map[string]string{"xray": "yes"},
		Stop: infer.StopRule{MaxSamples: 1 << 30}, Seed: seed(41)}
	j := e.submit(&q)
	e.runOnce("w")
	got, err := e.svc.Cancel(e.ctx, j.ID)
	if err != nil {
		t.Fatal(err)
	}
	if got.State != jobs.StateCancelled || got.Result.State != "cancelled" || got.Result.StopReason != sampling.ReasonCancelled || got.FinishedAt.IsZero() {
		t.Fatalf("cancelled job: state %s, result state %q stop %q", got.State, got.Result.State, got.Result.StopReason)
	}
	prefix := q
	prefix.Stop.MaxSamples = sampling.DefaultBlockSize
	sameResult(t, got.Result, reference(t, testnets.ChestClinic(), &prefix), "stop_reason")
	if e.runOnce("w") {
		t.Fatalf("a worker found work in a cancelled job")
	}
	if raw, _ := e.store.BlockStats(e.ctx, j.ID, 0, 10); len(raw) != 0 {
		t.Fatalf("a cancelled job kept %d blocks", len(raw))
	}
	again, err := e.svc.Cancel(e.ctx, j.ID)
	if err != nil || again.State != jobs.StateCancelled || !again.FinishedAt.Equal(got.FinishedAt) {
		t.Fatalf("second Cancel changed the job: %v, %v", again, err)
	}
	if _, err := e.svc.Cancel(e.ctx, "nosuch"); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("Cancel(nosuch) = %v; want ErrNotFound", err)
	}
}

// Cancelling a job stops the work unit that runs it: a Gibbs run of a
// billion sweeps ends as soon as its worker looks at the job (every 250ms).
func TestCancelStopsRunningUnit(t *testing.T) {
	jobstest.CheckGoroutines(t)
	e := newEnv(t, jobs.Config{}, nil)
	e.putDoc(randomDoc())
	j := e.submit(&infer.Query{Model: "random-10", Method: infer.MethodGibbs, Stop: infer.StopRule{MaxSamples: 1 << 30}, Seed: seed(42)})
	ran := make(chan error, 1)
	go func() {
		_, err := e.svc.RunOnce(e.ctx, "w")
		ran <- err
	}()
	jobstest.Eventually(t, 10*time.Second, "the job starts", func() bool { return e.get(j.ID).State == jobs.StateRunning })
	if _, err := e.svc.Cancel(e.ctx, j.ID); err != nil {
		t.Fatal(err)
	}
	select {
	case err := <-ran:
		if err != nil {
			t.Fatalf("RunOnce: %v", err)
		}
	case <-time.After(20 * time.Second):
		t.Fatalf("the Gibbs unit did not stop after Cancel")
	}
	if e.obs.outcome(jobs.OutcomeCancelled) != 1 {
		t.Fatalf("outcomes %v; want one cancelled unit", e.obs.outcomes)
	}
	if got := e.get(j.ID); got.State != jobs.StateCancelled {
		t.Fatalf("state %s; want cancelled", got.State)
	}
}

// A job past its deadline ends with the result of its merged blocks and
// stop reason "timeout"; the deadline is the query's stop.timeout, or
// MaxJobTime, counted from the start.
func TestDeadline(t *testing.T) {
	for _, tc := range []struct {
		name    string
		timeout string
		cfg     jobs.Config
		after   time.Duration
	}{
		{"stop timeout", "30s", jobs.Config{}, 30 * time.Second},
		{"max job time", "", jobs.Config{MaxJobTime: time.Minute}, time.Minute},
		{"timeout capped by max job time", "1h", jobs.Config{MaxJobTime: time.Minute}, time.Minute},
	} {
		t.Run(tc.name, func(t *testing.T) {
			clock := jobstest.NewClock(time.Date(2031, 1, 1, 0, 0, 0, 0, time.UTC))
			e := newEnv(t, tc.cfg, clock)
			q := infer.Query{Model: "chest-clinic", Method: infer.MethodLikelihoodWeighting, Evidence: map[string]string{"xray": "yes"},
				Stop: infer.StopRule{Timeout: tc.timeout}, Seed: seed(51)}
			j := e.submit(&q)
			e.runOnce("w")
			e.runOnce("w")
			clock.Advance(tc.after - time.Nanosecond)
			if got := e.get(j.ID); got.State != jobs.StateRunning {
				t.Fatalf("state %s before the deadline", got.State)
			}
			clock.Advance(time.Nanosecond)
			e.runOnce("w")
			got := e.get(j.ID)
			if got.State != jobs.StateSucceeded || got.Result.StopReason != sampling.ReasonTimeout || got.Result.Samples != 2*sampling.DefaultBlockSize {
				t.Fatalf("after the deadline: state %s, stop %q, %d samples; want succeeded, timeout, 2 blocks",
					got.State, got.Result.StopReason, got.Result.Samples)
			}
			prefix := q
			prefix.Stop = infer.StopRule{MaxSamples: 2 * sampling.DefaultBlockSize}
			sameResult(t, got.Result, reference(t, testnets.ChestClinic(), &prefix), "stop_reason")
		})
	}
}

// An exact job that outlives its deadline fails with a clear error, and a
// Gibbs job ends with its partial result and stop reason "timeout".
func TestDeadlineSingleUnit(t *testing.T) {
	jobstest.CheckGoroutines(t)
	for _, method := range []string{infer.MethodExact, infer.MethodGibbs} {
		t.Run(method, func(t *testing.T) {
			clock := jobstest.NewClock(time.Date(2031, 1, 1, 0, 0, 0, 0, time.UTC))
			// The lease outlasts the jump of the clock.
			e := newEnv(t, jobs.Config{MaxJobTime: time.Minute, LeaseTime: time.Hour}, clock)
			e.putDoc(randomDoc())
			entered, release := make(chan struct{}), make(chan struct{})
			var once sync.Once
			jobs.SetHookUnit(e.svc, func(*jobs.Job, int64) {
				once.Do(func() { close(entered) })
				if method == infer.MethodExact {
					<-release // exact inference that takes long
				}
			})
			defer close(release)
			j := e.submit(&infer.Query{Model: "random-10", Method: method, Stop: infer.StopRule{MaxSamples: 1 << 30}, Seed: seed(52)})
			ran := make(chan error, 1)
			go func() {
				_, err := e.svc.RunOnce(e.ctx, "w")
				ran <- err
			}()
			<-entered
			clock.Advance(time.Minute)
			if err := <-ran; err != nil {
				t.Fatalf("RunOnce: %v", err)
			}
			got := e.get(j.ID)
			switch method {
			case infer.MethodExact:
				if got.State != jobs.StateFailed || !strings.Contains(got.Error, "did not finish within the job's time limit of 1m0s") {
					t.Fatalf("exact job past its deadline: state %s, error %q", got.State, got.Error)
				}
			default:
				if got.State != jobs.StateSucceeded || got.Result == nil || got.Result.StopReason != sampling.ReasonTimeout {
					t.Fatalf("gibbs job past its deadline: state %s, result %+v, error %q", got.State, got.Result, got.Error)
				}
			}
		})
	}
}

// A worker whose lease is taken while it draws a block commits nothing; the
// block is drawn again by the new holder and the job's answer is unchanged.
func TestLostLeaseCommitsNothing(t *testing.T) {
	jobstest.CheckGoroutines(t)
	clock := jobstest.NewClock(time.Date(2031, 1, 1, 0, 0, 0, 0, time.UTC))
	e := newEnv(t, jobs.Config{}, clock)
	q := infer.Query{Model: "chest-clinic", Method: infer.MethodRejection, Evidence: map[string]string{"dysp": "yes"},
		Stop: infer.StopRule{MaxSamples: 5 * sampling.DefaultBlockSize}, Seed: seed(61)}
	j := e.submit(&q)
	var stolen atomic.Bool
	jobs.SetHookUnit(e.svc, func(job *jobs.Job, b int64) {
		if b != 0 || !stolen.CompareAndSwap(false, true) {
			return
		}
		clock.Advance(2 * jobs.DefaultLeaseTime) // the lease runs out
		if got, err := e.store.ClaimBlock(e.ctx, job.ID, "thief", 1, jobs.DefaultLeaseTime); err != nil || got != 0 {
			t.Errorf("thief claim = %d, %v; want block 0", got, err)
		}
	})
	e.runOnce("w")
	if e.obs.outcome(jobs.OutcomeLostLease) != 1 || e.obs.outcome(jobs.OutcomeCommitted) != 0 {
		t.Fatalf("outcomes %v; want one lost lease and no commit", e.obs.outcomes)
	}
	if raw, _ := e.store.BlockStats(e.ctx, j.ID, 0, 1); len(raw) != 0 {
		t.Fatalf("a worker without the lease committed block 0")
	}
	if err := e.store.ReleaseBlock(e.ctx, j.ID, 0, "thief"); err != nil {
		t.Fatal(err)
	}
	done := e.drain(j.ID, 2)
	sameResult(t, done.Result, reference(t, testnets.ChestClinic(), &q))
}

// A block run twice (its first worker lost the lease, a second one
// committed it, then the first commits too) is counted once: the first
// commit stays and the late one, whatever it holds, changes nothing.
func TestBlockRunTwiceCountedOnce(t *testing.T) {
	clock := jobstest.NewClock(time.Date(2031, 1, 1, 0, 0, 0, 0, time.UTC))
	e := newEnv(t, jobs.Config{}, clock)
	q := infer.Query{Model: "chest-clinic", Method: infer.MethodLikelihoodWeighting, Evidence: map[string]string{"xray": "yes"},
		Stop: infer.StopRule{MaxSamples: 4 * sampling.DefaultBlockSize}, Seed: seed(71)}
	j := e.submit(&q)
	net := testnets.MustCompile(testnets.ChestClinic())
	ev, _ := net.ResolveEvidence(q.Evidence, nil)
	k, err := sampling.NewKernel(net, ev, infer.MethodLikelihoodWeighting, nil)
	if err != nil {
		t.Fatal(err)
	}
	genuine := k.NewStats()
	k.RunBlock(*q.Seed, 0, sampling.DefaultBlockSize, genuine)
	good, _ := json.Marshal(genuine)
	bogus := genuine.Clone()
	bogus.N *= 2
	bogus.SumW *= 3
	bad, _ := json.Marshal(bogus)

	if b, _ := e.store.ClaimBlock(e.ctx, j.ID, "ghost-1", 1, time.Second); b != 0 {
		t.Fatalf("ghost-1 claim = %d", b)
	}
	clock.Advance(2 * time.Second)
	if b, _ := e.store.ClaimBlock(e.ctx, j.ID, "ghost-2", 1, time.Minute); b != 0 {
		t.Fatalf("ghost-2 claim = %d", b)
	}
	if err := e.store.CommitBlock(e.ctx, j.ID, 0, "ghost-2", good); err != nil {
		t.Fatal(err)
	}
	if err := e.store.CommitBlock(e.ctx, j.ID, 0, "ghost-1", bad); err != nil {
		t.Fatalf("late commit of a committed block: %v", err)
	}
	done := e.drain(j.ID, 3)
	if done.Result.Samples != 4*sampling.DefaultBlockSize {
		t.Fatalf("%d samples; want %d", done.Result.Samples, 4*sampling.DefaultBlockSize)
	}
	sameResult(t, done.Result, reference(t, testnets.ChestClinic(), &q))
}

// A panic in a work unit fails its job; the worker goes on.
func TestPanicFailsJob(t *testing.T) {
	jobstest.CheckGoroutines(t)
	e := newEnv(t, jobs.Config{}, nil)
	jobs.SetHookUnit(e.svc, func(j *jobs.Job, _ int64) {
		if j.Method == infer.MethodForward {
			panic("kernel bug")
		}
	})
	bad := e.submit(&infer.Query{Model: "chest-clinic", Method: infer.MethodForward, Stop: infer.StopRule{MaxSamples: 100}})
	ok := e.submit(&infer.Query{Model: "chest-clinic", Method: infer.MethodExact})
	e.runOnce("w")
	got := e.get(bad.ID)
	if got.State != jobs.StateFailed || !strings.Contains(got.Error, "internal error in block 0: kernel bug") {
		t.Fatalf("job after a panic: state %s, error %q", got.State, got.Error)
	}
	if done := e.drain(ok.ID, 1); done.State != jobs.StateSucceeded {
		t.Fatalf("the next job: %s", done.State)
	}
	if e.obs.outcome(jobs.OutcomeError) != 1 {
		t.Fatalf("outcomes %v; want one error", e.obs.outcomes)
	}
}

// When the worker's context ends mid-unit, the unit is handed back at once
// for another worker, for blocks and for single units alike.
func TestShutdownHandsBack(t *testing.T) {
	jobstest.CheckGoroutines(t)
	for _, method := range []string{infer.MethodLikelihoodWeighting, infer.MethodGibbs} {
		t.Run(method, func(t *testing.T) {
			e := newEnv(t, jobs.Config{}, nil)
			e.putDoc(randomDoc())
			ctx, cancel := context.WithCancel(e.ctx)
			entered := make(chan struct{})
			var once sync.Once
			jobs.SetHookUnit(e.svc, func(*jobs.Job, int64) {
				once.Do(func() { close(entered) })
				<-ctx.Done()
			})
			j := e.submit(&infer.Query{Model: "random-10", Method: method, Stop: infer.StopRule{MaxSamples: 1 << 20}, Seed: seed(81)})
			ran := make(chan error, 1)
			go func() {
				_, err := e.svc.RunOnce(ctx, "w")
				ran <- err
			}()
			<-entered
			cancel()
			if err := <-ran; !errors.Is(err, context.Canceled) {
				t.Fatalf("RunOnce after shutdown = %v; want context.Canceled", err)
			}
			if b, err := e.store.ClaimBlock(e.ctx, j.ID, "other", 1, time.Minute); err != nil || b != 0 {
				t.Fatalf("claim after hand-back = %d, %v; want block 0 at once", b, err)
			}
			if got := e.get(j.ID); got.State.Terminal() {
				t.Fatalf("shutdown ended the job: %s", got.State)
			}
		})
	}
}

// Watch sends the current record, then changes; a slow reader gets the
// newest record instead of a backlog; the channel closes after the end.
func TestWatch(t *testing.T) {
	jobstest.CheckGoroutines(t)
	e := newEnv(t, jobs.Config{}, nil)
	j := e.submit(&infer.Query{Model: "chest-clinic", Method: infer.MethodForward, Stop: infer.StopRule{MaxSamples: 12 * sampling.DefaultBlockSize}, Seed: seed(91)})
	ch, err := e.svc.Watch(e.ctx, j.ID)
	if err != nil {
		t.Fatal(err)
	}
	first := <-ch
	if first.ID != j.ID || first.State != jobs.StateQueued {
		t.Fatalf("first value: %s %s", first.ID, first.State)
	}
	for e.runOnce("w") { // a dozen changes while nobody reads
	}
	var got []*jobs.Job
	for v := range ch {
		got = append(got, v)
	}
	last := got[len(got)-1]
	if last.State != jobs.StateSucceeded || last.Result.State != "succeeded" {
		t.Fatalf("last value: %s", last.State)
	}
	if len(got) > 2 {
		t.Fatalf("a slow reader got %d values after a dozen changes; want the newest only (at most one stale)", len(got))
	}
	// Watching a finished job sends it and closes.
	ch, err = e.svc.Watch(e.ctx, j.ID)
	if err != nil {
		t.Fatal(err)
	}
	if v, ok := <-ch; !ok || v.State != jobs.StateSucceeded {
		t.Fatalf("watch of a finished job: %v %v", v, ok)
	}
	if _, ok := <-ch; ok {
		t.Fatalf("watch of a finished job stays open")
	}
	if _, err := e.svc.Watch(e.ctx, "nosuch"); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("Watch(nosuch) = %v", err)
	}
	// Ending the context closes the channel.
	j2 := e.submit(&infer.Query{Model: "chest-clinic", Method: infer.MethodExact})
	ctx, cancel := context.WithCancel(e.ctx)
	ch, err = e.svc.Watch(ctx, j2.ID)
	if err != nil {
		t.Fatal(err)
	}
	<-ch
	cancel()
	for range ch {
	}
}

func TestModels(t *testing.T) {
	e := newEnv(t, jobs.Config{MaxModelBytes: 4096}, nil)
	doc := testnets.ChestClinic()
	raw, _ := json.Marshal(doc)
	indented, _ := json.MarshalIndent(doc, "", "  ")
	info, created, err := e.svc.PutModel(e.ctx, indented)
	if err != nil || created || info.Version != 1 {
		t.Fatalf("same content, other layout: v%d created %v, %v; want v1 not created", info.Version, created, err)
	}
	doc.Variables[0].Table = [][]float64{{0.98, 0.02}}
	changed, _ := json.Marshal(doc)
	info, created, err = e.svc.PutModel(e.ctx, changed)
	if err != nil || !created || info.Version != 2 || info.Variables != 8 || info.Bytes != len(changed) {
		t.Fatalf("changed content: %+v created %v, %v; want v2", info, created, err)
	}
	got, data, err := e.svc.GetModel(e.ctx, "chest-clinic@1")
	if err != nil || got.Version != 1 || string(data) != string(raw) {
		t.Fatalf("GetModel(@1) = v%d, %v", got.Version, err)
	}
	if got, _, err := e.svc.GetModel(e.ctx, "chest-clinic"); err != nil || got.Version != 2 {
		t.Fatalf("GetModel(latest) = v%d, %v", got.Version, err)
	}
	for _, ref := range []string{"", "@1", "chest-clinic@0", "chest-clinic@x"} {
		if _, _, err := e.svc.GetModel(e.ctx, ref); !errors.Is(err, infer.ErrBadQuery) {
			t.Errorf("GetModel(%q) = %v; want ErrBadQuery", ref, err)
		}
	}
	for _, c := range []struct {
		doc  string
		want error
	}{
		{`{"name": "x", "variables": [`, model.ErrMalformed},
		{`{"name": "x", "variables": []}`, model.ErrInvalid},
		{`{"name": "a@b", "variables": [{"name": "v", "states": ["a", "b"], "table": [[0.5, 0.5]]}]}`, model.ErrInvalid},
		{`{"name": "", "variables": [{"name": "v", "states": ["a", "b"], "table": [[0.5, 0.5]]}]}`, model.ErrInvalid},
		{`{"name": "x", "variables": [{"name": "v", "states": ["a", "b"], "table": [[0.5, 0.6]]}]}`, model.ErrInvalid},
		{`{"name": "big", "description": "` + strings.Repeat("x", 5000) + `", "variables": []}`, model.ErrTooLarge},
	} {
		if _, _, err := e.svc.PutModel(e.ctx, []byte(c.doc)); !errors.Is(err, c.want) {
			t.Errorf("PutModel(%.40s) = %v; want %v", c.doc, err, c.want)
		}
	}
	e.putDoc(randomDoc())
	var names []string
	token := ""
	for range 5 {
		page, next, err := e.svc.ListModels(e.ctx, token, 1)
		if err != nil {
			t.Fatal(err)
		}
		for _, m := range page {
			names = append(names, m.Name)
		}
		if token = next; token == "" {
			break
		}
	}
	if strings.Join(names, ",") != "chest-clinic,random-10" {
		t.Fatalf("ListModels pages gave %v", names)
	}
	if _, _, err := e.svc.ListModels(e.ctx, "!!", 1); !errors.Is(err, infer.ErrBadQuery) {
		t.Fatalf("bad page token: %v", err)
	}
	if err := e.svc.DeleteModel(e.ctx, "chest-clinic"); err != nil {
		t.Fatal(err)
	}
	if _, _, err := e.svc.Submit(e.ctx, &infer.Query{Model: "chest-clinic"}); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("Submit on a deleted model: %v", err)
	}
	if err := e.svc.DeleteModel(e.ctx, "chest-clinic"); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("second DeleteModel: %v", err)
	}
}

func TestListJobs(t *testing.T) {
	e := newEnv(t, jobs.Config{}, nil)
	var ids []string
	for range 3 {
		ids = append([]string{e.submit(&infer.Query{Model: "chest-clinic"}).ID}, ids...)
	}
	var got []string
	token := ""
	for range 5 {
		page, next, err := e.svc.List(e.ctx, token, 2)
		if err != nil {
			t.Fatal(err)
		}
		for _, j := range page {
			got = append(got, j.ID)
		}
		if token = next; token == "" {
			break
		}
	}
	if strings.Join(got, ",") != strings.Join(ids, ",") {
		t.Fatalf("List pages = %v; want newest first %v", got, ids)
	}
}

func TestQuery(t *testing.T) {
	e := newEnv(t, jobs.Config{}, nil)
	q := infer.Query{Model: "chest-clinic", Method: infer.MethodRejection, Evidence: map[string]string{"xray": "yes"}, Stop: infer.StopRule{MaxSamples: 20_000}, Seed: seed(3)}
	res, err := e.svc.Query(e.ctx, &q)
	if err != nil {
		t.Fatal(err)
	}
	sameResult(t, res, reference(t, testnets.ChestClinic(), &q))
	if _, err := e.svc.Query(e.ctx, &infer.Query{Model: "chest-clinic", Method: infer.MethodForward, Evidence: map[string]string{"xray": "yes"}}); !errors.Is(err, infer.ErrBadQuery) {
		t.Fatalf("forward with evidence: %v; want ErrBadQuery", err)
	}
	if err := e.svc.Ready(e.ctx); err != nil {
		t.Fatal(err)
	}
}

func TestConfigValidate(t *testing.T) {
	for _, c := range []struct {
		cfg   jobs.Config
		field string
	}{
		{jobs.Config{LeaseTime: time.Millisecond}, "LeaseTime"},
		{jobs.Config{PartialEvery: 2 * time.Second}, "PartialEvery"},
		{jobs.Config{MaxUnfinished: -1}, "MaxUnfinished"},
		{jobs.Config{Retention: -time.Second}, "Retention"},
		{jobs.Config{LookAhead: -3}, "LookAhead"},
		{jobs.Config{Limits: model.Limits{MaxStates: -1}}, "Limits.MaxStates"},
	} {
		_, err := jobs.NewService(nil, c.cfg, nil)
		if err == nil {
			t.Fatalf("nil store accepted")
		}
		var ce *jobs.ConfigError
		if err := c.cfg.Validate(); !errors.As(err, &ce) || ce.Field != c.field || !errors.Is(err, jobs.ErrBadConfig) {
			t.Errorf("Validate(%+v) = %v; want a ConfigError on %s", c.cfg, err, c.field)
		}
	}
	if err := (jobs.Config{}).Validate(); err != nil {
		t.Fatalf("zero Config: %v", err)
	}
}

// An exact job whose evidence is impossible fails with the engine's error:
// "either" is the any-of gate of tub and lung (Lauritzen & Spiegelhalter
// 1988), so either = no with tub = yes has probability zero.
func TestExactJobFails(t *testing.T) {
	e := newEnv(t, jobs.Config{}, nil)
	j := e.submit(&infer.Query{Model: "chest-clinic", Method: infer.MethodExact, Evidence: map[string]string{"either": "no", "tub": "yes"}})
	done := e.drain(j.ID, 1)
	if done.State != jobs.StateFailed || !strings.Contains(done.Error, exact.ErrZeroEvidence.Error()) || done.Result != nil {
		t.Fatalf("job with impossible evidence: state %s, error %q", done.State, done.Error)
	}
	if e.obs.outcome(jobs.OutcomeError) != 1 {
		t.Fatalf("outcomes %v; want one error", e.obs.outcomes)
	}
}

// The stopping rule is checked after every merged block, not once per
// merge step: when many blocks are committed before any is merged (here
// forty, by another worker), the job still stops at the first prefix that
// meets the rule, as infer.Runner does.
func TestStopRuleOnEveryPrefix(t *testing.T) {
	const committed = 40
	e := newEnv(t, jobs.Config{}, nil)
	q := infer.Query{Model: "chest-clinic", Method: infer.MethodLikelihoodWeighting,
		Evidence: map[string]string{"dysp": "yes"}, SoftEvidence: map[string][]float64{"xray": {0.3, 0.9}},
		Stop: infer.StopRule{AbsErr: 0.006}, Seed: seed(13)}
	want := reference(t, testnets.ChestClinic(), &q)
	if want.StopReason != sampling.ReasonAbsErr || want.Samples >= (committed-1)*sampling.DefaultBlockSize {
		t.Fatalf("precondition: the reference stops by %s after %d samples; want abs_err well within %d blocks", want.StopReason, want.Samples, committed)
	}
	j := e.submit(&q)
	net := testnets.MustCompile(testnets.ChestClinic())
	ev, err := net.ResolveEvidence(q.Evidence, q.SoftEvidence)
	if err != nil {
		t.Fatal(err)
	}
	k, err := sampling.NewKernel(net, ev, infer.MethodLikelihoodWeighting, nil)
	if err != nil {
		t.Fatal(err)
	}
	for b := int64(0); b < committed; b++ {
		if got, err := e.store.ClaimBlock(e.ctx, j.ID, "other", committed, time.Minute); err != nil || got != b {
			t.Fatalf("claim = %d, %v; want %d", got, err, b)
		}
		st := k.NewStats()
		k.RunBlock(*q.Seed, b, sampling.DefaultBlockSize, st)
		data, _ := json.Marshal(st)
		if err := e.store.CommitBlock(e.ctx, j.ID, b, "other", data); err != nil {
			t.Fatal(err)
		}
	}
	done := e.drain(j.ID, 1)
	sameResult(t, done.Result, want)
}
