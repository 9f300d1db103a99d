package exact_test

import (
	"math/rand/v2"
	"testing"

	"github.com/beliefd/beliefd/service/exact"
	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/model"
)

// benchNet is a 40-variable random model (up to 3 parents and 3 states per
// variable; seed 7, the first seed giving about 500 free parameters: 502)
// with hard evidence on four variables and soft evidence on one. Its
// junction tree has 31 cliques and 8765 table entries.
func benchNet(b *testing.B) (*model.Network, *exact.Engine, *model.Evidence, []int) {
	rng := rand.New(rand.NewPCG(7, 1))
	net := testnets.MustCompile(testnets.Random(rng, testnets.RandomOptions{Vars: 40, MaxParents: 3, MaxStates: 3}))
	eng, err := exact.Compile(net, exact.Options{})
	if err != nil {
		b.Fatal(err)
	}
	ev := net.NoEvidence()
	for _, v := range []int{5, 17, 29, 39} {
		ev.Hard[v] = 1
	}
	ev.Soft[12] = make([]float64, net.Vars[12].Card())
	for k := range ev.Soft[12] {
		ev.Soft[12][k] = 0.2 + 0.3*float64(k)
	}
	targets, err := net.ResolveTargets(nil, ev)
	if err != nil {
		b.Fatal(err)
	}
	b.ReportMetric(float64(net.FreeParameters()), "free-params")
	b.ReportMetric(float64(eng.Cost().TotalEntries), "entries")
	return net, eng, ev, targets
}

// BenchmarkPosterior: all posterior marginals of the benchmark model.
func BenchmarkPosterior(b *testing.B) {
	_, eng, ev, targets := benchNet(b)
	b.ReportAllocs()
	for b.Loop() {
		if _, err := eng.Posterior(ev, targets); err != nil {
			b.Fatal(err)
		}
	}
}

// BenchmarkPosteriorInto: the same query reusing the result.
func BenchmarkPosteriorInto(b *testing.B) {
	_, eng, ev, targets := benchNet(b)
	var post exact.Posterior
	b.ReportAllocs()
	for b.Loop() {
		if err := eng.PosteriorInto(&post, ev, targets); err != nil {
			b.Fatal(err)
		}
	}
}

// BenchmarkPosteriorParallel: the same query from all cores at once.
func BenchmarkPosteriorParallel(b *testing.B) {
	_, eng, ev, targets := benchNet(b)
	b.ReportAllocs()
	b.RunParallel(func(pb *testing.PB) {
		var post exact.Posterior
		for pb.Next() {
			if err := eng.PosteriorInto(&post, ev, targets); err != nil {
				b.Error(err)
				return
			}
		}
	})
}

// BenchmarkMPE: most probable explanation on the benchmark model.
func BenchmarkMPE(b *testing.B) {
	_, eng, ev, _ := benchNet(b)
	b.ReportAllocs()
	for b.Loop() {
		if _, err := eng.MPE(ev); err != nil {
			b.Fatal(err)
		}
	}
}

// BenchmarkCompile: triangulation and table construction of the model.
func BenchmarkCompile(b *testing.B) {
	net, _, _, _ := benchNet(b)
	b.ReportAllocs()
	for b.Loop() {
		if _, err := exact.Compile(net, exact.Options{}); err != nil {
			b.Fatal(err)
		}
	}
}

// BenchmarkEstimateCost on 3000 variables: with local structure (parents
// among the previous 15 variables) and without (parents anywhere, a
// treewidth in the hundreds).
func BenchmarkEstimateCost(b *testing.B) {
	for _, c := range []struct {
		name   string
		window int
	}{{"local", 15}, {"unstructured", 0}} {
		rng := rand.New(rand.NewPCG(7, 8))
		net := testnets.MustCompile(testnets.Random(rng, testnets.RandomOptions{Vars: 3000, MaxParents: 3, MaxStates: 3, Window: c.window}))
		b.Run(c.name, func(b *testing.B) {
			b.ReportAllocs()
			var cost exact.Cost
			for b.Loop() {
				cost = exact.EstimateCost(net)
			}
			b.ReportMetric(float64(cost.Treewidth), "treewidth")
		})
	}
}
