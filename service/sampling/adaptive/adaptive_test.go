package adaptive

import (
	"context"
	"errors"
	"math"
	"math/rand/v2"
	"slices"
	"testing"

	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
)

// chestEvidence is unlikely evidence on the chest-clinic network
// (Lauritzen & Spiegelhalter 1988, JRSS-B 50(2):157-224): a visit to Asia,
// dyspnoea and a normal X-ray.
var chestEvidence = map[string]string{"asia": "yes", "dysp": "yes", "xray": "no"}

// The same seed gives bit-identical results with 1, 2 or 8 workers, and a
// second sampler built from scratch (as another process would) learns the
// same importance functions.
func TestDeterministicAcrossWorkers(t *testing.T) {
	ft := testnets.FaultTree(rand.New(rand.NewPCG(5, 1)), testnets.FaultTreeOptions{Trains: 3, Components: 8})
	net := testnets.MustCompile(ft.Doc)
	ev := evidence(t, net, map[string]string{ft.Alarms[0]: "firing", ft.Alarms[3]: "firing"})
	top := index(t, net, ft.Top)
	targets := []int{top, index(t, net, ft.Trains[1])}
	var ref *Result
	for _, w := range []int{1, 2, 8} {
		res := run(t, net, ev, targets, Options{Seed: 99, Workers: w, BlockSize: 500, RareTargets: []int{top}, LearnSamples: 1000,
			Stop: sampling.Stop{MaxSamples: 8000}})
		if ref == nil {
			ref = res
			if len(res.Tracks) < 2 {
				t.Fatalf("want a rare-state track, got %d tracks", len(res.Tracks))
			}
			continue
		}
		a, b := ref.Estimate, res.Estimate
		if a.Samples != b.Samples || a.EffectiveSamples != b.EffectiveSamples || *a.Evidence != *b.Evidence || a.MaxWeightShare != b.MaxWeightShare {
			t.Errorf("workers %d: samples/ESS/evidence differ: %v %v %+v vs %v %v %+v", w, a.Samples, a.EffectiveSamples, *a.Evidence, b.Samples, b.EffectiveSamples, *b.Evidence)
		}
		for i := range a.Marginals {
			for s := range a.Marginals[i] {
				if a.Marginals[i][s] != b.Marginals[i][s] {
					t.Errorf("workers %d: marginal %d/%d %+v vs %+v", w, i, s, a.Marginals[i][s], b.Marginals[i][s])
				}
			}
		}
		for i := range ref.Tracks {
			x, y := ref.Tracks[i], res.Tracks[i]
			if x.Joint != y.Joint || !(x.ParetoK == y.ParetoK || math.IsNaN(x.ParetoK) && math.IsNaN(y.ParetoK)) {
				t.Errorf("workers %d: track %d differs: %+v vs %+v", w, i, x, y)
			}
		}
	}
	// Two samplers built independently: the same tables, bit for bit.
	o := Options{Seed: 99, RareTargets: []int{top}, LearnSamples: 1000}
	s1, err := NewSampler(context.Background(), net, ev, targets, o)
	if err != nil {
		t.Fatal(err)
	}
	o.Workers = 1
	s2, err := NewSampler(context.Background(), net, ev, targets, o)
	if err != nil {
		t.Fatal(err)
	}
	if s1.Tracks() != s2.Tracks() {
		t.Fatalf("tracks %d vs %d", s1.Tracks(), s2.Tracks())
	}
	for i := range s1.tracks {
		if !slices.Equal(s1.tracks[i].q, s2.tracks[i].q) || s1.tracks[i].log2Ref != s2.tracks[i].log2Ref {
			t.Errorf("track %d: learned tables differ", i)
		}
	}
	b1, b2 := s1.NewStats(), s2.NewStats()
	s1.RunBlock(99, 7, 500, b1)
	s2.RunBlock(99, 7, 500, b2)
	for i := range b1.Tracks {
		if b1.Tracks[i].SumW != b2.Tracks[i].SumW || b1.Tracks[i].SumW2 != b2.Tracks[i].SumW2 || !slices.Equal(b1.Tracks[i].Top, b2.Tracks[i].Top) {
			t.Errorf("block 7 track %d differs between the samplers", i)
		}
	}
}

// The estimate of P(evidence) is unbiased: the mean of 200 independent runs
// (different seeds, so different learned importance functions) is within
// z·sd/√R of the exact value (z at 99.9%, so the test fails by chance with
// probability about 0.001). Exact value by the junction tree.
func TestEvidenceUnbiased(t *testing.T) {
	net := testnets.MustCompile(testnets.ChestClinic())
	ev := evidence(t, net, chestEvidence)
	want := math.Exp(exactPosterior(t, net, ev, nil).LogEvidence)
	const runs = 200
	var sum, sum2 float64
	for seed := uint64(1); seed <= runs; seed++ {
		res := run(t, net, ev, nil, Options{Seed: seed, Workers: 1, LearnSamples: 500, PilotSamples: 500, RareThreshold: -1,
			Stop: sampling.Stop{MaxSamples: 400}})
		p := res.Estimate.Evidence.P
		sum += p
		sum2 += p * p
	}
	mean := sum / runs
	sd := math.Sqrt((sum2 - sum*mean) / (runs - 1))
	if z := (mean - want) / (sd / math.Sqrt(runs)); math.Abs(z) > z999 {
		t.Errorf("mean P(evidence) %v over %d runs, exact %v: z = %.2f beyond %.2f", mean, runs, want, z, z999)
	}
}

// Intervals cover the exact values at the nominal rate: over 200 seeds the
// number of 95% intervals that cover lies in the 99.9% band of a
// Binomial(200, 0.95) count (gonum), for P(evidence) and for posterior
// marginals. Exact values by the junction tree. (With 2,000 samples the
// interval of P(tub | evidence) = 0.0022, which then rests on about a dozen
// samples of uneven weight, covers only about 80% of the time: the
// package comment says so.)
func TestCoverage(t *testing.T) {
	net := testnets.MustCompile(testnets.ChestClinic())
	ev := evidence(t, net, chestEvidence)
	targets := []int{index(t, net, "tub"), index(t, net, "lung"), index(t, net, "bronc")}
	post := exactPosterior(t, net, ev, targets)
	pe := math.Exp(post.LogEvidence)
	const runs = 200
	lo, hi := binomialBand(runs, 0.95, 0.999)
	counts := make([]int, 1+len(targets))
	for seed := uint64(1); seed <= runs; seed++ {
		res := run(t, net, ev, targets, Options{Seed: 1000 + seed, Workers: 1, LearnSamples: 500, PilotSamples: 500, RareThreshold: -1,
			Stop: sampling.Stop{MaxSamples: 20_000}})
		if covers(*res.Estimate.Evidence, pe) {
			counts[0]++
		}
		for i := range targets {
			if covers(res.Estimate.Marginals[i][1], post.Marginals[i][1]) {
				counts[1+i]++
			}
		}
	}
	names := []string{"P(evidence)", "tub", "lung", "bronc"}
	for i, c := range counts {
		if c < lo || c > hi {
			t.Errorf("%s: %d of %d intervals cover, outside the binomial band [%d, %d]", names[i], c, runs, lo, hi)
		}
	}
}

// On generated failure-propagation networks the estimates agree with exact
// inference: P(evidence) and P(top event | evidence) (a rare-state track)
// at 99.9% confidence, for evidence of a few alarms.
func TestFaultTreeAgreesWithExact(t *testing.T) {
	for seed := uint64(1); seed <= 3; seed++ {
		ft := testnets.FaultTree(rand.New(rand.NewPCG(seed, 2)), testnets.FaultTreeOptions{Trains: 3, Components: 12})
		net := testnets.MustCompile(ft.Doc)
		ev := evidence(t, net, map[string]string{ft.Alarms[0]: "firing", ft.Alarms[1]: "firing"})
		top := index(t, net, ft.Top)
		post := exactPosterior(t, net, ev, []int{top})
		res := run(t, net, ev, []int{top}, Options{Seed: seed, RareTargets: []int{top}, Workers: 2,
			Stop: sampling.Stop{MaxSamples: 40_000, Confidence: 0.999}})
		e := res.Estimate
		if pe := math.Exp(post.LogEvidence); !covers(*e.Evidence, pe) {
			t.Errorf("net %d: P(evidence) %+v, exact %v", seed, *e.Evidence, pe)
		}
		if p := post.Marginals[0][1]; !covers(e.Marginals[0][1], p) {
			t.Errorf("net %d: P(top | evidence) %+v, exact %v (warnings %q)", seed, e.Marginals[0][1], p, e.Warnings)
		}
	}
}

// A relative-precision request stops the run once P(evidence) and every
// target state meet it, and the answer then covers the exact value.
func TestRelativePrecisionStop(t *testing.T) {
	ps := []float64{1e-3, 1e-3, 1e-3, 1e-3, 1e-3}
	net := compile(t, gateNet(ps, model.Variable{Gate: &model.Gate{Type: model.GateKOfN, K: 3}}))
	top := index(t, net, "top")
	want := binomTail(5, 3, 1e-3) // closed form, about 1e-8
	res := run(t, net, nil, []int{top}, Options{Seed: 4, RareTargets: []int{top}, Stop: sampling.Stop{RelErr: 0.05, Confidence: 0.999}})
	e := res.Estimate
	if e.StopReason != sampling.ReasonRelErr {
		t.Fatalf("stop reason %q, want %q", e.StopReason, sampling.ReasonRelErr)
	}
	iv := e.Marginals[0][1]
	if iv.HalfWidth() > 0.05*iv.P || !covers(iv, want) {
		t.Errorf("P(top) %+v: want half-width <= 5%% and covering %v", iv, want)
	}
}

// The (ε, δ) rule: on a model whose weights are bounded by a known
// maximum, the reported interval [μ̂/(1+ε), μ̂/(1−ε)] covers the exact value
// in at least 1 − δ of the runs: over 100 seeds the misses stay within the
// 99.9% binomial band of Binomial(100, δ) (gonum).
func TestEpsDeltaRule(t *testing.T) {
	doc := gateNet([]float64{0.02, 0.05, 0.01}, model.Variable{Gate: &model.Gate{Type: model.GateAnyOf}})
	doc.Variables = append(doc.Variables, model.Variable{Name: "alarm", States: []string{"quiet", "firing"}, Parents: []string{"top"},
		Table: [][]float64{{0.999, 0.001}, {0.2, 0.8}}})
	net := compile(t, doc)
	ev := evidence(t, net, map[string]string{"alarm": "firing"})
	want := math.Exp(exactPosterior(t, net, ev, nil).LogEvidence)
	const runs = 100
	const delta = 0.1
	_, hi := binomialBand(runs, delta, 0.999)
	misses := 0
	for seed := uint64(1); seed <= runs; seed++ {
		res := run(t, net, ev, nil, Options{Seed: seed, Workers: 1, RareThreshold: -1, LearnSamples: 500, PilotSamples: 500,
			EpsDelta: &EpsDelta{Epsilon: 0.3, Delta: delta}, Stop: sampling.Stop{MaxSamples: 2_000_000}})
		if res.Estimate.StopReason != ReasonEpsDelta {
			t.Fatalf("seed %d: stop reason %q, want %q (notes %q)", seed, res.Estimate.StopReason, ReasonEpsDelta, res.EpsDelta.Notes)
		}
		iv := res.EpsDelta.Tracks[0]
		if iv == nil || !res.EpsDelta.Met {
			t.Fatalf("seed %d: rule not reported as met: %+v", seed, res.EpsDelta)
		}
		if !covers(*iv, want) {
			misses++
		}
	}
	if misses > hi {
		t.Errorf("%d of %d (ε, δ) intervals miss P(evidence) = %v; at most %d expected for δ = %v", misses, runs, want, hi, delta)
	}
}

// The rule says so when it cannot be met within the sample budget.
func TestEpsDeltaReportsBudget(t *testing.T) {
	net := testnets.MustCompile(testnets.ChestClinic())
	ev := evidence(t, net, chestEvidence)
	res := run(t, net, ev, nil, Options{Seed: 1, RareThreshold: -1, EpsDelta: &EpsDelta{Epsilon: 0.001, Delta: 0.01},
		Stop: sampling.Stop{MaxSamples: 5000}})
	if res.EpsDelta.Met || res.Estimate.StopReason != sampling.ReasonMaxSamples {
		t.Fatalf("rule met with ε = 0.001 in 5000 samples: %+v", res.EpsDelta)
	}
	if len(res.EpsDelta.Notes) == 0 || res.EpsDelta.ExpectedSamples[0] <= 5000 {
		t.Errorf("want a note that the rule needs more samples, got %q (expected samples %v)", res.EpsDelta.Notes, res.EpsDelta.ExpectedSamples)
	}
}

// Bad options and impossible evidence get clear errors.
func TestBadInput(t *testing.T) {
	net := testnets.MustCompile(testnets.ChestClinic())
	ctx := context.Background()
	for _, o := range []Options{
		{Workers: -1},
		{RareThreshold: 2},
		{MaxTracks: MaxTracks + 1},
		{Epsilon: 0.7},
		{EpsDelta: &EpsDelta{Epsilon: 0, Delta: 0.1}},
		{EpsDelta: &EpsDelta{Epsilon: 0.1, Delta: 1}},
		{BlockSize: -3},
	} {
		if _, err := NewSampler(ctx, net, nil, nil, o); !errors.Is(err, ErrBadOptions) {
			t.Errorf("options %+v: error %v, want ErrBadOptions", o, err)
		}
	}
	if _, err := NewSampler(ctx, net, nil, nil, Options{Stop: sampling.Stop{RelErr: -1}}); !errors.Is(err, sampling.ErrBadStop) {
		t.Errorf("bad stop: error %v, want ErrBadStop", err)
	}
	// either = no while tub = yes contradicts the any_of gate.
	ev := evidence(t, net, map[string]string{"tub": "yes", "either": "no"})
	if _, err := NewSampler(ctx, net, ev, nil, Options{}); !errors.Is(err, ErrImpossibleEvidence) {
		t.Errorf("impossible evidence: error %v, want ErrImpossibleEvidence", err)
	}
	if _, err := NewSampler(ctx, net, nil, []int{0}, Options{RareTargets: []int{3}}); !errors.Is(err, model.ErrBadEvidence) {
		t.Errorf("rare target not a target: error %v, want ErrBadEvidence", err)
	}
}
