package gibbs

import (
	"context"
	"sync/atomic"
	"testing"

	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
)

// benchQuery is a strictly positive random model of 40 variables (2-4
// states, up to 3 parents) with hard evidence on two variables and soft
// evidence on one; the targets are all unobserved variables.
func benchQuery(b *testing.B) (*model.Network, *model.Evidence, []int) {
	net := randomNet(2024, 40, 3, 4)
	ev := net.NoEvidence()
	ev.Hard[39] = 0
	ev.Hard[25] = 1
	lik := make([]float64, net.Vars[12].Card())
	for s := range lik {
		lik[s] = 1 + float64(s)
	}
	ev.Soft[12] = lik
	targets, err := net.ResolveTargets(nil, ev)
	if err != nil {
		b.Fatal(err)
	}
	return net, ev, targets
}

// BenchmarkSweep measures one chain's sweeps over the 40-variable model,
// counting and storing every target, without diagnostics.
func BenchmarkSweep(b *testing.B) {
	net, ev, targets := benchQuery(b)
	p, err := newPlan(net, ev, targets)
	if err != nil {
		b.Fatal(err)
	}
	ch := newChain(p, maxStore, maxStore+DefaultSegmentSweeps+1)
	ch.rng = sampling.NewStream(1, 0)
	if err := ch.start(); err != nil {
		b.Fatal(err)
	}
	var abort atomic.Bool
	b.ReportAllocs()
	b.ResetTimer()
	for done := int64(0); done < int64(b.N); {
		to := min(done+DefaultSegmentSweeps, int64(b.N))
		ch.runSegment(done, to, 0, &abort)
		ch.commit()
		done = to
	}
	b.ReportMetric(float64(b.N)/b.Elapsed().Seconds(), "sweeps/s")
	b.ReportMetric(float64(len(p.free)), "free-vars")
}

// BenchmarkRun measures whole runs of 200,000 kept sweeps (4 chains,
// default burn-in of 5,000 sweeps per chain, GOMAXPROCS workers,
// diagnostics at the end) on the same model.
func BenchmarkRun(b *testing.B) {
	net, ev, targets := benchQuery(b)
	kept := int64(0)
	for i := 0; i < b.N; i++ {
		est, err := Run(context.Background(), net, ev, targets, Options{Seed: uint64(i), Stop: sampling.Stop{MaxSamples: 200_000}})
		if err != nil {
			b.Fatal(err)
		}
		kept += est.Samples
	}
	b.ReportMetric(float64(kept)/b.Elapsed().Seconds(), "kept-sweeps/s")
}
