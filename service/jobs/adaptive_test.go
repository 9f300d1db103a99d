package jobs_test

import (
	"context"
	"fmt"
	"math/rand/v2"
	"sync"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/jobstest"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
)

// An adaptive importance sampling job is cut into blocks like likelihood
// weighting: its final result is bit for bit the result of infer.Runner
// (`beliefd run`) for the same query and seed, with 1, 2 or 8 workers, and
// with the workers spread over two services on one store (two processes,
// each of which learns the importance functions itself).
func TestAdaptiveJobMatchesRunner(t *testing.T) {
	jobstest.CheckGoroutines(t)
	ft := testnets.FaultTree(rand.New(rand.NewPCG(5, 1)), testnets.FaultTreeOptions{Trains: 3, Components: 8})
	ev := map[string]string{ft.Alarms[0]: "firing", ft.Alarms[3]: "firing"}
	cases := []struct {
		name string
		doc  *model.Document
		q    infer.Query
		stop string // the stop reason the case is built to reach
	}{
		// A rare target: two tracks, so the cap is shared; several blocks.
		{"max-samples", ft.Doc, infer.Query{Method: infer.MethodAdaptive, Evidence: ev, Targets: []string{ft.Top, ft.Trains[1]},
			Adaptive: &infer.AdaptiveOptions{RareTargets: []string{ft.Top}},
			Stop:     infer.StopRule{MaxSamples: 60_000}, Seed: seed(31)}, sampling.ReasonMaxSamples},
		// A precision rule stops at the first merged prefix that meets it.
		{"rel-err", ft.Doc, infer.Query{Method: infer.MethodAdaptive, Evidence: ev, Targets: []string{ft.Trains[0]},
			Adaptive: &infer.AdaptiveOptions{RareThreshold: -1},
			Stop:     infer.StopRule{RelErr: 0.02, MaxSamples: 5_000_000}, Seed: seed(32)}, sampling.ReasonRelErr},
		// The (ε, δ) rule marks its crossing inside a block (unlikely
		// evidence on the chest-clinic network, Lauritzen & Spiegelhalter
		// 1988, whose weights have a small bound).
		{"eps-delta", testnets.ChestClinic(), infer.Query{Method: infer.MethodAdaptive,
			Evidence: map[string]string{"asia": "yes", "xray": "yes"},
			Adaptive: &infer.AdaptiveOptions{RareThreshold: -1, EpsDelta: &infer.EpsDeltaRule{Epsilon: 0.1, Delta: 0.05}},
			Stop:     infer.StopRule{MaxSamples: 2_000_000}, Seed: seed(33)}, "eps_delta"},
	}
	for _, tc := range cases {
		var first *jobs.Job
		for _, workers := range []int{1, 2, 8} {
			t.Run(fmt.Sprintf("%s/%d", tc.name, workers), func(t *testing.T) {
				e := newEnv(t, jobs.Config{}, nil)
				q := tc.q
				q.Model = e.putDoc(tc.doc).Name
				j := e.submit(&q)
				if !j.Blockwise() || j.Blocks < 2 {
					t.Fatalf("adaptive job planned as %d blocks of %d; want block-wise", j.Blocks, j.BlockSize)
				}
				done := e.drain(j.ID, workers)
				if done.State != jobs.StateSucceeded || done.Result == nil {
					t.Fatalf("job ended %s (%s)", done.State, done.Error)
				}
				if done.Result.StopReason != tc.stop {
					t.Fatalf("stop reason %q; the case is meant to reach %q", done.Result.StopReason, tc.stop)
				}
				if done.MergedBlocks < 1 || done.MergedAdaptive == nil || done.MergedAdaptive.Blocks != done.MergedBlocks {
					t.Fatalf("merged %d blocks, statistics %+v", done.MergedBlocks, done.MergedAdaptive)
				}
				sameResult(t, done.Result, reference(t, tc.doc, &q))
				if first == nil {
					first = done
				} else {
					sameResult(t, done.Result, first.Result)
				}
			})
		}
	}
}

// Two services on one store stand for two worker processes: each learns
// the importance functions on its own, from the seed, and their blocks
// merge into the runner's result.
func TestAdaptiveJobAcrossProcesses(t *testing.T) {
	jobstest.CheckGoroutines(t)
	ft := testnets.FaultTree(rand.New(rand.NewPCG(5, 1)), testnets.FaultTreeOptions{Trains: 3, Components: 8})
	e := newEnv(t, jobs.Config{}, nil)
	q := infer.Query{Model: e.putDoc(ft.Doc).Name, Method: infer.MethodAdaptive,
		Evidence: map[string]string{ft.Alarms[0]: "firing", ft.Alarms[3]: "firing"}, Targets: []string{ft.Top},
		Adaptive: &infer.AdaptiveOptions{RareTargets: []string{ft.Top}},
		Stop:     infer.StopRule{MaxSamples: 80_000}, Seed: seed(34)}
	j := e.submit(&q)
	other, err := jobs.NewService(e.store, jobs.Config{Logger: quietLogger()}, newRecorder())
	if err != nil {
		t.Fatal(err)
	}
	ctx, cancel := context.WithTimeout(e.ctx, time.Minute)
	defer cancel()
	var wg sync.WaitGroup
	errs := make(chan error, 4)
	for w, svc := range []*jobs.Service{e.svc, other, e.svc, other} {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for ctx.Err() == nil {
				if cur := e.get(j.ID); cur.State.Terminal() {
					return
				}
				worked, err := svc.RunOnce(ctx, fmt.Sprintf("w%d", w))
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
	wg.Wait()
	close(errs)
	for err := range errs {
		t.Fatalf("RunOnce: %v", err)
	}
	done := e.get(j.ID)
	if done.State != jobs.StateSucceeded {
		t.Fatalf("job ended %s (%s)", done.State, done.Error)
	}
	sameResult(t, done.Result, reference(t, ft.Doc, &q))
}

// A process that never learned an adaptive job's importance functions
// (an API process, say) cancels it with the latest partial result instead
// of learning them inside the cancel.
func TestAdaptiveCancelElsewhere(t *testing.T) {
	ft := testnets.FaultTree(rand.New(rand.NewPCG(5, 1)), testnets.FaultTreeOptions{Trains: 3, Components: 8})
	e := newEnv(t, jobs.Config{}, nil)
	q := infer.Query{Model: e.putDoc(ft.Doc).Name, Method: infer.MethodAdaptive,
		Evidence: map[string]string{ft.Alarms[0]: "firing"}, Targets: []string{ft.Top},
		Stop: infer.StopRule{MaxSamples: 50_000_000}, Seed: seed(35)}
	j := e.submit(&q)
	for e.get(j.ID).MergedBlocks < 2 {
		if _, err := e.svc.RunOnce(e.ctx, "w"); err != nil {
			t.Fatal(err)
		}
	}
	api, err := jobs.NewService(e.store, jobs.Config{Logger: quietLogger()}, newRecorder())
	if err != nil {
		t.Fatal(err)
	}
	got, err := api.Cancel(e.ctx, j.ID)
	if err != nil {
		t.Fatal(err)
	}
	if got.State != jobs.StateCancelled || got.Result == nil || got.Result.StopReason != sampling.ReasonCancelled || got.Result.Samples <= 0 {
		t.Fatalf("cancelled job: state %s, result %+v", got.State, got.Result)
	}
}
