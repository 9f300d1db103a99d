package gibbs

import (
	"context"
	"errors"
	"fmt"
	"math"
	"reflect"
	"strings"
	"sync/atomic"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
)

// checkAgainstExact compares every marginal of every run with the exact
// value. Each estimate is asymptotically normal around the exact value with
// standard error sqrt(p(1−p)/ESS_state) (Markov-chain central limit theorem);
// the test uses the target's ESS, the smallest over its states, which only
// widens the bound. With k comparisons in all, z = Φ⁻¹(1 − α/(2k)) keeps the
// family-wise false-failure rate at most α (Bonferroni).
type comparison struct {
	name  string
	state int
	exact float64
	got   float64
	ess   float64
}

func checkComparisons(t *testing.T, cs []comparison, alpha float64) {
	t.Helper()
	z := twoSidedZ(alpha / float64(len(cs)))
	for _, c := range cs {
		se := math.Sqrt(c.exact * (1 - c.exact) / c.ess)
		if math.Abs(c.got-c.exact) > z*se {
			t.Errorf("%s state %d: estimate %.5f, exact %.5f, |diff| %.2g > %.2f·se (se %.2g, ESS %.0f)",
				c.name, c.state, c.got, c.exact, math.Abs(c.got-c.exact), z, se, c.ess)
		}
	}
}

func compareRun(t *testing.T, label string, net *model.Network, ev *model.Evidence, targets []int, est *sampling.Estimate) []comparison {
	t.Helper()
	exact, _ := enumerate(t, net, ev, targets)
	var cs []comparison
	for i, tv := range targets {
		if est.ESS[i] < ESSLimit || est.RHat[i] > RHatLimit {
			t.Errorf("%s %s: R-hat %.4f, ESS %.0f: the chains did not mix as the recommendations require", label, net.Vars[tv].Name, est.RHat[i], est.ESS[i])
		}
		for s, p := range exact[i] {
			cs = append(cs, comparison{label + " " + net.Vars[tv].Name, s, p, est.Marginals[i][s].P, est.ESS[i]})
		}
	}
	return cs
}

func TestAgreesWithEnumerationOnRandomPositiveNetworks(t *testing.T) {
	var cs []comparison
	for k, seed := range []uint64{101, 202, 303} {
		net := randomNet(seed, 10, 3, 3) // ZeroProb 0: strictly positive tables
		ev := net.NoEvidence()
		// Hard evidence on two late variables, soft evidence on a middle one.
		ev.Hard[9] = 0
		ev.Hard[7] = int(seed) % net.Vars[7].Card()
		// A zero likelihood removes a state from the posterior; it does
		// not make the chain reducible (see the package comment).
		lik := make([]float64, net.Vars[4].Card())
		for s := range lik {
			lik[s] = 0.3 * float64(s)
		}
		ev.Soft[4] = lik
		targets, err := net.ResolveTargets(nil, ev)
		if err != nil {
			t.Fatal(err)
		}
		est, err := Run(context.Background(), net, ev, targets, Options{Seed: seed, Stop: sampling.Stop{MaxSamples: 40_000}})
		if err != nil {
			t.Fatalf("net %d: %v", k, err)
		}
		if est.Method != Method || est.StopReason != sampling.ReasonMaxSamples || est.Samples != 40_000 {
			t.Errorf("net %d: method %q, reason %q, samples %d", k, est.Method, est.StopReason, est.Samples)
		}
		cs = append(cs, compareRun(t, "random", net, ev, targets, est)...)
	}
	checkComparisons(t, cs, 0.001)
}

func TestAgreesWithEnumerationOnNearlyDeterministicChestClinic(t *testing.T) {
	net := nearGateChestClinic()
	ev := net.NoEvidence()
	ev.Hard[mustIndex(t, net, "xray")] = 1 // yes
	ev.Hard[mustIndex(t, net, "dysp")] = 1 // yes
	ev.Soft[mustIndex(t, net, "smoke")] = []float64{0.6, 0.4}
	targets, err := net.ResolveTargets(nil, ev)
	if err != nil {
		t.Fatal(err)
	}
	est, err := Run(context.Background(), net, ev, targets, Options{Seed: 7, Stop: sampling.Stop{MaxSamples: 100_000}})
	if err != nil {
		t.Fatal(err)
	}
	checkComparisons(t, compareRun(t, "chest-clinic", net, ev, targets, est), 0.001)
}

func TestThinnedRunAgreesWithEnumeration(t *testing.T) {
	// A cap of 256 stored draws per target and chain forces the stored
	// series to be thinned many times over (25,000 kept sweeps per chain).
	// Marginals still use every sweep; the diagnostics describe the thinned
	// series, whose ESS cannot exceed its length.
	net := nearGateChestClinic()
	ev := net.NoEvidence()
	ev.Hard[mustIndex(t, net, "xray")] = 1
	targets, err := net.ResolveTargets(nil, ev)
	if err != nil {
		t.Fatal(err)
	}
	est, err := Run(context.Background(), net, ev, targets, Options{Seed: 8, Stop: sampling.Stop{MaxSamples: 100_000}, storeCap: 256})
	if err != nil {
		t.Fatal(err)
	}
	for i := range targets {
		// 4 chains × at most 256 stored draws, capped at N·log10 N.
		if limit := 1024 * math.Log10(1024); est.ESS[i] > limit {
			t.Errorf("target %d: ESS %.0f from at most 1024 stored draws", i, est.ESS[i])
		}
	}
	checkComparisons(t, compareRun(t, "thinned", net, ev, targets, est), 0.001)
}

func TestBarrenGateIsNotSampled(t *testing.T) {
	// With no evidence and target tub, the deterministic gate below tub is
	// barren: it sums out and cannot trap the chain. Published marginal:
	// P(tub = yes) = 0.0104 (Lauritzen & Spiegelhalter 1988, JRSS-B 50(2),
	// as quoted by testnets.ChestClinic).
	net := testnets.MustCompile(testnets.ChestClinic())
	tub := mustIndex(t, net, "tub")
	est, err := Run(context.Background(), net, nil, []int{tub}, Options{Seed: 3, Stop: sampling.Stop{MaxSamples: 40_000}})
	if err != nil {
		t.Fatal(err)
	}
	checkComparisons(t, []comparison{{"tub", 1, 0.0104, est.Marginals[0][1].P, est.ESS[0]}}, 0.001)
}

func TestRefusesDeterministicGate(t *testing.T) {
	net := testnets.MustCompile(testnets.ChestClinic())
	xray, lung, tub, either := mustIndex(t, net, "xray"), mustIndex(t, net, "lung"), mustIndex(t, net, "tub"), mustIndex(t, net, "either")

	ev := net.NoEvidence()
	ev.Hard[xray] = 1
	_, err := Run(context.Background(), net, ev, []int{lung}, Options{Seed: 1})
	var re *ReducibleError
	if !errors.Is(err, ErrReducible) || !errors.As(err, &re) {
		t.Fatalf("gate with evidence below it: err = %v, want a *ReducibleError", err)
	}
	if re.Variable != "either" || re.Table != "either" {
		t.Errorf("refusal names variable %q, table %q; want either, either", re.Variable, re.Table)
	}
	for _, want := range []string{`"either"`, "P(either=yes | tub=no, lung=no) = 0", "likelihood weighting", "exact inference"} {
		if !strings.Contains(err.Error(), want) {
			t.Errorf("error %q does not mention %s", err, want)
		}
	}

	// Evidence on the gate itself: the zero sits in the observed column of
	// either's table and traps its unobserved parents.
	ev = net.NoEvidence()
	ev.Hard[either] = 1
	_, err = Run(context.Background(), net, ev, []int{tub}, Options{Seed: 1})
	if !errors.As(err, &re) || re.Table != "either" || (re.Variable != "tub" && re.Variable != "lung") {
		t.Errorf("observed gate: err = %v, want a refusal naming tub or lung and the table of either", err)
	}
}

func TestRefusesZeroTableEntry(t *testing.T) {
	doc := &model.Document{Name: "zero", Variables: []model.Variable{
		{Name: "a", States: []string{"x", "y"}, Table: [][]float64{{0.5, 0.5}}},
		{Name: "b", States: []string{"x", "y"}, Parents: []string{"a"}, Table: [][]float64{{0.7, 0.3}, {0, 1}}},
	}}
	net := testnets.MustCompile(doc)
	ev := net.NoEvidence()
	ev.Soft[1] = []float64{1, 2}
	_, err := Run(context.Background(), net, ev, []int{0}, Options{})
	var re *ReducibleError
	if !errors.As(err, &re) || re.Table != "b" || re.Row != 1 || re.State != 0 {
		t.Errorf("err = %v, want a refusal at table b row 1 state 0", err)
	}
	// Observing b = y leaves only positive entries in b's observed column:
	// accepted, and P(a = y | b = y) = 0.5·1 / (0.5·0.3 + 0.5·1) = 10/13.
	ev = net.NoEvidence()
	ev.Hard[1] = 1
	est, err := Run(context.Background(), net, ev, []int{0}, Options{Seed: 5, Stop: sampling.Stop{MaxSamples: 20_000}})
	if err != nil {
		t.Fatal(err)
	}
	checkComparisons(t, []comparison{{"a", 1, 10.0 / 13, est.Marginals[0][1].P, est.ESS[0]}}, 0.001)
}

func TestUnderflowFallsBackToLogSpace(t *testing.T) {
	// A root x with 400 observed children, each observed in a state of
	// probability 1e-3 given x = a and 1.001e-3 given x = b: the product of
	// the children's factors (1e-1200) underflows, so the conditional is
	// drawn in log space. With a uniform prior, Bayes' rule gives
	// P(x = b | children) = 1 / (1 + (1/1.001)^400) (closed form). x is the
	// only unobserved variable, so every sweep is an independent exact draw.
	const kids = 400
	doc := &model.Document{Name: "many-children", Variables: []model.Variable{
		{Name: "x", States: []string{"a", "b"}, Table: [][]float64{{0.5, 0.5}}},
	}}
	for k := 0; k < kids; k++ {
		doc.Variables = append(doc.Variables, model.Variable{
			Name: fmt.Sprintf("c%d", k), States: []string{"quiet", "alarm"}, Parents: []string{"x"},
			Table: [][]float64{{1 - 1e-3, 1e-3}, {1 - 1.001e-3, 1.001e-3}},
		})
	}
	net := testnets.MustCompile(doc)
	ev := net.NoEvidence()
	for v := 1; v <= kids; v++ {
		ev.Hard[v] = 1
	}
	est, err := Run(context.Background(), net, ev, []int{0}, Options{Seed: 4, Stop: sampling.Stop{MaxSamples: 20_000}})
	if err != nil {
		t.Fatal(err)
	}
	want := 1 / (1 + math.Pow(1/1.001, kids))
	checkComparisons(t, []comparison{{"x", 1, want, est.Marginals[0][1].P, est.ESS[0]}}, 0.001)
}

func TestImpossibleEvidence(t *testing.T) {
	doc := &model.Document{Name: "never", Variables: []model.Variable{
		{Name: "a", States: []string{"x", "y"}, Table: [][]float64{{1, 0}}},
		{Name: "b", States: []string{"x", "y"}, Parents: []string{"a"}, Table: [][]float64{{0.5, 0.5}, {0.5, 0.5}}},
	}}
	net := testnets.MustCompile(doc)
	ev := net.NoEvidence()
	ev.Hard[0] = 1
	_, err := Run(context.Background(), net, ev, []int{1}, Options{})
	if !errors.Is(err, ErrImpossibleEvidence) || !strings.Contains(err.Error(), `"a"`) {
		t.Errorf("err = %v, want ErrImpossibleEvidence naming a", err)
	}
}

func TestCoverage(t *testing.T) {
	// 200 independent runs (seeds 1..200) with small budgets; count how
	// often the 95% interval of P(v3 = s0 | evidence) covers the exact
	// value. The intervals are approximate (Markov-chain CLT with an
	// estimated ESS); with 1000 kept sweeps per chain the ESS here is in the
	// thousands and the normal approximation holds. Accept the count if it
	// lies in the central 99.9% band of Binomial(200, 0.95) (gonum).
	net := randomNet(404, 6, 2, 2)
	ev := net.NoEvidence()
	ev.Hard[5] = 1
	ev.Soft[1] = []float64{0.3, 0.9}
	const target, state = 3, 0
	exact, _ := enumerate(t, net, ev, []int{target})
	const runs = 200
	covered := 0
	minESS := math.Inf(1)
	for seed := uint64(1); seed <= runs; seed++ {
		est, err := Run(context.Background(), net, ev, []int{target}, Options{Seed: seed, Workers: 1, Stop: sampling.Stop{MaxSamples: 4000}})
		if err != nil {
			t.Fatal(err)
		}
		minESS = math.Min(minESS, est.ESS[0])
		iv := est.Marginals[0][state]
		if iv.Lo <= exact[0][state] && exact[0][state] <= iv.Hi {
			covered++
		}
	}
	lo, hi := binomialBand(runs, 0.95, 0.001)
	t.Logf("exact %.4f; covered %d of %d, band [%d, %d]; smallest ESS %.0f", exact[0][state], covered, runs, lo, hi, minESS)
	if minESS < ESSLimit {
		t.Errorf("test design: a run had ESS %.0f, below the %d the intervals need", minESS, ESSLimit)
	}
	if covered < lo || covered > hi {
		t.Errorf("95%% intervals covered the exact value %d times in %d runs, want within [%d, %d]", covered, runs, lo, hi)
	}
}

func runEqual(t *testing.T, a, b *sampling.Estimate) bool {
	t.Helper()
	a2, b2 := *a, *b
	a2.Elapsed, b2.Elapsed = 0, 0
	return reflect.DeepEqual(a2, b2)
}

func TestDeterministicAcrossWorkers(t *testing.T) {
	net := randomNet(505, 40, 3, 3)
	ev := net.NoEvidence()
	ev.Hard[39] = 0
	ev.Hard[20] = 1
	ev.Soft[10] = []float64{0.2, 1, 0.5}[:net.Vars[10].Card()]
	targets, err := net.ResolveTargets(nil, ev)
	if err != nil {
		t.Fatal(err)
	}
	for _, stop := range []sampling.Stop{{MaxSamples: 8000}, {AbsErr: 0.03, MaxSamples: 400_000}} {
		var first *sampling.Estimate
		for _, w := range []int{1, 2, 8} {
			est, err := Run(context.Background(), net, ev, targets, Options{Seed: 99, Stop: stop, SegmentSweeps: 50, BurnIn: 120, Workers: w})
			if err != nil {
				t.Fatal(err)
			}
			if first == nil {
				first = est
				continue
			}
			if !runEqual(t, first, est) {
				t.Errorf("stop %+v: workers=%d gives a different estimate than workers=1", stop, w)
			}
		}
		t.Logf("stop %+v: reason %s, samples %d", stop, first.StopReason, first.Samples)
	}
	// A different seed gives different draws.
	a, _ := Run(context.Background(), net, ev, targets, Options{Seed: 1, Stop: sampling.Stop{MaxSamples: 8000}})
	b, _ := Run(context.Background(), net, ev, targets, Options{Seed: 2, Stop: sampling.Stop{MaxSamples: 8000}})
	if runEqual(t, a, b) {
		t.Error("seeds 1 and 2 gave identical estimates")
	}
}

func TestStopReasons(t *testing.T) {
	net := randomNet(606, 8, 2, 2)
	ev := net.NoEvidence()
	ev.Hard[7] = 1
	targets := []int{2, 4}
	ctx := context.Background()

	est, err := Run(ctx, net, ev, targets, Options{Seed: 1, Chains: 3, Stop: sampling.Stop{MaxSamples: 3001}})
	if err != nil {
		t.Fatal(err)
	}
	if est.StopReason != sampling.ReasonMaxSamples || est.Samples != 3000 {
		t.Errorf("max_samples 3001 over 3 chains: reason %q, samples %d; want max_samples, 3000", est.StopReason, est.Samples)
	}

	est, err = Run(ctx, net, ev, targets, Options{Seed: 1, Stop: sampling.Stop{AbsErr: 0.02, MaxSamples: 4_000_000}})
	if err != nil {
		t.Fatal(err)
	}
	if est.StopReason != sampling.ReasonAbsErr || est.Samples >= 4_000_000 {
		t.Errorf("abs_err: reason %q after %d samples", est.StopReason, est.Samples)
	}
	for i := range est.Marginals {
		if est.RHat[i] > RHatLimit || est.ESS[i] < ESSLimit {
			t.Errorf("abs_err stop with R-hat %v, ESS %v", est.RHat[i], est.ESS[i])
		}
		for _, iv := range est.Marginals[i] {
			if iv.HalfWidth() > 0.02 {
				t.Errorf("abs_err stop with half-width %v", iv.HalfWidth())
			}
		}
	}

	est, err = Run(ctx, net, ev, targets, Options{Seed: 1, Stop: sampling.Stop{RelErr: 0.05, MaxSamples: 4_000_000}})
	if err != nil {
		t.Fatal(err)
	}
	if est.StopReason != sampling.ReasonRelErr {
		t.Errorf("rel_err: reason %q after %d samples", est.StopReason, est.Samples)
	}
	for i := range est.Marginals {
		for _, iv := range est.Marginals[i] {
			if iv.HalfWidth() > 0.05*iv.P {
				t.Errorf("rel_err stop with interval %+v", iv)
			}
		}
	}

	est, err = Run(ctx, net, ev, targets, Options{Seed: 1, Stop: sampling.Stop{Timeout: 1}})
	if err != nil {
		t.Fatal(err)
	}
	if est.StopReason != sampling.ReasonTimeout {
		t.Errorf("timeout 1ns: reason %q", est.StopReason)
	}

	// Targets that are all observed are answered exactly.
	est, err = Run(ctx, net, ev, []int{7}, Options{})
	if err != nil {
		t.Fatal(err)
	}
	if est.StopReason != sampling.ReasonExact || est.Marginals[0][1] != (sampling.Interval{P: 1, Lo: 1, Hi: 1}) || est.Marginals[0][0] != (sampling.Interval{}) || len(est.Warnings) > 0 {
		t.Errorf("observed target: reason %q, marginals %+v", est.StopReason, est.Marginals[0])
	}
}

func TestCancellation(t *testing.T) {
	net := randomNet(707, 8, 2, 2)
	targets := []int{3}

	ctx, cancel := context.WithCancel(context.Background())
	cancel()
	est, err := Run(ctx, net, nil, targets, Options{Seed: 1})
	if err != nil {
		t.Fatalf("cancelled before start: err = %v, want a partial estimate", err)
	}
	if est.StopReason != sampling.ReasonCancelled || est.Samples != 0 || len(est.Warnings) == 0 {
		t.Errorf("cancelled before start: reason %q, samples %d, warnings %q", est.StopReason, est.Samples, est.Warnings)
	}

	// Cancel from the first progress report, after round 0: segments of 64
	// sweeps with a burn-in of 10 keep 54 sweeps in each of 4 chains.
	ctx, cancel = context.WithCancel(context.Background())
	defer cancel()
	calls := 0
	progress := func(p *sampling.Estimate) {
		calls++
		if p.StopReason != "" || p.Method != Method {
			t.Errorf("partial estimate: reason %q, method %q", p.StopReason, p.Method)
		}
		cancel()
	}
	est, err = Run(ctx, net, nil, targets, Options{Seed: 1, BurnIn: 10, SegmentSweeps: 64, Progress: progress, ProgressEvery: 1})
	if err != nil {
		t.Fatal(err)
	}
	if calls != 1 || est.StopReason != sampling.ReasonCancelled || est.Samples != 4*54 {
		t.Errorf("cancel after round 0: %d progress calls, reason %q, samples %d; want 1, cancelled, 216", calls, est.StopReason, est.Samples)
	}
	sum := 0.0
	for _, iv := range est.Marginals[0] {
		sum += iv.P
		if iv.Lo > iv.P || iv.P > iv.Hi {
			t.Errorf("interval %+v does not contain its estimate", iv)
		}
	}
	if math.Abs(sum-1) > 1e-12 {
		t.Errorf("partial marginals sum to %v", sum)
	}
}

func TestInterruptedRoundIsDropped(t *testing.T) {
	// One huge segment per round: the timeout fires inside round 0, whose
	// partial statistics are dropped, so the estimate is that of zero
	// rounds. (Only the outcome is checked, not how long anything took.)
	net := randomNet(717, 8, 2, 2)
	est, err := Run(context.Background(), net, nil, []int{3, 5}, Options{
		Seed: 1, BurnIn: 10, SegmentSweeps: MaxSegmentSweeps,
		Stop: sampling.Stop{Timeout: 20 * time.Millisecond, MaxSamples: 1 << 40},
	})
	if err != nil {
		t.Fatal(err)
	}
	perRound := int64(4 * (MaxSegmentSweeps - 10))
	if est.StopReason != sampling.ReasonTimeout || est.Samples%perRound != 0 {
		t.Errorf("reason %q, samples %d; want timeout and a multiple of %d", est.StopReason, est.Samples, perRound)
	}
}

func TestManyStatesTarget(t *testing.T) {
	// A root with 300 states (stored as uint16) and an observed binary
	// child: P(root = k | child = on) ∝ prior(k) · P(on | k) by Bayes' rule
	// (closed form).
	const card = 300
	states := make([]string, card)
	prior := make([]float64, card)
	rows := make([][]float64, card)
	for k := range states {
		states[k] = fmt.Sprintf("s%d", k)
		prior[k] = 1.0 / card
		on := 0.1 + 0.8*float64(k)/card
		rows[k] = []float64{1 - on, on}
	}
	doc := &model.Document{Name: "wide", Variables: []model.Variable{
		{Name: "root", States: states, Table: [][]float64{prior}},
		{Name: "child", States: []string{"off", "on"}, Parents: []string{"root"}, Table: rows},
	}}
	net := testnets.MustCompile(doc)
	ev := net.NoEvidence()
	ev.Hard[1] = 1
	est, err := Run(context.Background(), net, ev, []int{0}, Options{Seed: 6, Stop: sampling.Stop{MaxSamples: 40_000}})
	if err != nil {
		t.Fatal(err)
	}
	z := 0.0
	for k := range rows {
		z += prior[k] * rows[k][1]
	}
	var cs []comparison
	for k := range rows {
		cs = append(cs, comparison{"root", k, prior[k] * rows[k][1] / z, est.Marginals[0][k].P, est.ESS[0]})
	}
	checkComparisons(t, cs, 0.001)
}

func TestBadInput(t *testing.T) {
	net := randomNet(808, 5, 2, 2)
	ctx := context.Background()
	cases := []struct {
		name    string
		net     *model.Network
		ev      *model.Evidence
		targets []int
		opt     Options
		want    error
	}{
		{"negative chains", net, nil, []int{0}, Options{Chains: -1}, ErrBadOptions},
		{"negative workers", net, nil, []int{0}, Options{Workers: -2}, ErrBadOptions},
		{"negative burn-in", net, nil, []int{0}, Options{BurnIn: -5}, ErrBadOptions},
		{"bad stop", net, nil, []int{0}, Options{Stop: sampling.Stop{AbsErr: 2}}, sampling.ErrBadStop},
		{"budget below 12 per chain", net, nil, []int{0}, Options{Stop: sampling.Stop{MaxSamples: 40}}, sampling.ErrBadStop},
		{"no targets", net, nil, nil, Options{}, model.ErrBadEvidence},
		{"target out of range", net, nil, []int{5}, Options{}, model.ErrBadEvidence},
		{"short evidence", net, &model.Evidence{Hard: []int{-1}}, []int{0}, Options{}, model.ErrBadEvidence},
		{"state out of range", net, &model.Evidence{Hard: []int{-1, 7, -1, -1, -1}}, []int{0}, Options{}, model.ErrBadEvidence},
		{"zero soft evidence", net, &model.Evidence{Soft: [][]float64{nil, {0, 0}, nil, nil, nil}}, []int{0}, Options{}, model.ErrBadEvidence},
		{"hard and soft on one variable", net, &model.Evidence{Hard: []int{-1, 0, -1, -1, -1}, Soft: [][]float64{nil, {1, 2}, nil, nil, nil}}, []int{0}, Options{}, model.ErrBadEvidence},
		{"negative likelihood", net, &model.Evidence{Soft: [][]float64{nil, {-1, 2}, nil, nil, nil}}, []int{0}, Options{}, model.ErrBadEvidence},
	}
	for _, c := range cases {
		_, err := Run(ctx, c.net, c.ev, c.targets, c.opt)
		if !errors.Is(err, c.want) {
			t.Errorf("%s: err = %v, want %v", c.name, err, c.want)
		} else if !strings.HasPrefix(err.Error(), "gibbs: ") {
			t.Errorf("%s: error %q lacks the package prefix", c.name, err)
		}
	}
	if _, err := Run(ctx, nil, nil, []int{0}, Options{}); err == nil {
		t.Error("nil network accepted")
	}
}

func TestThinningKeepsEveryStrideDraw(t *testing.T) {
	// Two chains from the same stream, one storing every draw, one with a
	// small cap: the thinned series must be exactly every stride-th kept
	// draw of the full one, and the counts must use all draws.
	net := randomNet(909, 6, 2, 3)
	p, err := newPlan(net, nil, []int{2, 5})
	if err != nil {
		t.Fatal(err)
	}
	full := newChain(p, 1<<20, 0)
	thin := newChain(p, 16, 0)
	full.rng = sampling.NewStream(1, 0)
	thin.rng = sampling.NewStream(1, 0)
	if err := full.start(); err != nil {
		t.Fatal(err)
	}
	if err := thin.start(); err != nil {
		t.Fatal(err)
	}
	var abort atomic.Bool
	for seg := int64(0); seg < 20; seg++ {
		full.runSegment(seg*13, (seg+1)*13, 5, &abort)
		thin.runSegment(seg*13, (seg+1)*13, 5, &abort)
		full.commit()
		thin.commit()
		if thin.storeLen > 16 {
			t.Fatalf("stored %d draws over a cap of 16", thin.storeLen)
		}
	}
	if thin.stride < 2 || !reflect.DeepEqual(full.counts, thin.counts) || full.kept != 20*13-5 {
		t.Fatalf("stride %d, kept %d, counts %v vs %v", thin.stride, full.kept, thin.counts, full.counts)
	}
	for i := range p.targets {
		for k := 0; k < thin.store[i].len(); k++ {
			if got, want := thin.store[i].at(k), full.store[i].at(k*int(thin.stride)); got != want {
				t.Fatalf("target %d stored draw %d = %d, want kept draw %d = %d", i, k, got, k*int(thin.stride), want)
			}
		}
		if want := (int(full.kept) + int(thin.stride) - 1) / int(thin.stride); thin.store[i].len() != want {
			t.Errorf("target %d: %d stored draws, want %d", i, thin.store[i].len(), want)
		}
	}
}
