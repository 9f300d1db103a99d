package examples

import (
	"bytes"
	"context"
	"errors"
	"math"
	"sync"
	"testing"

	"github.com/beliefd/beliefd/service/exact"
	"github.com/beliefd/beliefd/service/examples/internal/gen"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/model"
)

// The generated model must be exactly what the generator makes, so that
// the shipped file cannot drift from its source.
func TestRegionsMatchesGenerator(t *testing.T) {
	want, err := gen.Regions()
	if err != nil {
		t.Fatal(err)
	}
	got, err := Raw(gen.RegionsName)
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(got, want) {
		i := 0
		for i < len(got) && i < len(want) && got[i] == want[i] {
			i++
		}
		t.Fatalf("%s.json (%d bytes) differs from the generator's output (%d bytes) from byte %d on; run 'go generate ./service/examples'",
			gen.RegionsName, len(got), len(want), i)
	}
	again, err := gen.Regions()
	if err != nil {
		t.Fatal(err)
	}
	if !bytes.Equal(again, want) {
		t.Fatal("two runs of the generator differ")
	}
}

// loadRegions loads the generated example once for all tests (they only
// read it).
var loadRegions = func() func(t *testing.T) (*model.Document, *model.Network) {
	var (
		once sync.Once
		doc  *model.Document
		net  *model.Network
		err  error
	)
	return func(t *testing.T) (*model.Document, *model.Network) {
		t.Helper()
		once.Do(func() { doc, net, err = Load(gen.RegionsName) }) // Load compiles with model.Limits{}, the defaults
		if err != nil {
			t.Fatal(err)
		}
		return doc, net
	}
}()

func TestRegionsSizeWithinDefaultLimits(t *testing.T) {
	raw, err := Raw(gen.RegionsName)
	if err != nil {
		t.Fatal(err)
	}
	_, net := loadRegions(t)
	if n := len(net.Vars); n < 2000 || n > 5000 {
		t.Errorf("%d variables, want a few thousand (2,000 to 5,000)", n)
	}
	// A few MB at most: well inside the default document limit of the
	// decoder, the HTTP API and the job service.
	if len(raw) > 4<<20 || int64(len(raw)) > model.DefaultMaxDocumentBytes {
		t.Errorf("document of %d bytes, want at most 4 MiB", len(raw))
	}
	if e := net.TableEntries(); e > model.DefaultLimits.MaxTableEntries {
		t.Errorf("%d table entries exceed the default limit %d", e, model.DefaultLimits.MaxTableEntries)
	}
}

// Exact inference must refuse the model, and for the reason the cost
// estimate gives; the hand-written example must still fit.
func TestRegionsTooCostlyForExact(t *testing.T) {
	_, net := loadRegions(t)
	cost := exact.EstimateCost(net)
	if cost.TotalEntries <= exact.DefaultMaxEntries {
		t.Fatalf("estimated junction tree of %d entries fits the default limit %d; the example should need sampling", cost.TotalEntries, exact.DefaultMaxEntries)
	}
	t.Logf("estimated junction tree: %d entries, largest clique %d, treewidth %d, %d cliques",
		cost.TotalEntries, cost.LargestClique, cost.Treewidth, cost.Cliques)
	_, err := exact.Compile(net, exact.Options{})
	var tc *exact.TooCostlyError
	if !errors.Is(err, exact.ErrTooCostly) || !errors.As(err, &tc) {
		t.Fatalf("exact.Compile: %v, want a *TooCostlyError", err)
	}
	if tc.Estimate != cost {
		t.Errorf("refusal carries estimate %+v, EstimateCost gives %+v", tc.Estimate, cost)
	}

	_, small, err := Load("tarnwick-platform")
	if err != nil {
		t.Fatal(err)
	}
	if c := exact.EstimateCost(small); c.TotalEntries > exact.DefaultMaxEntries {
		t.Errorf("tarnwick-platform needs %d entries; it should stay exact", c.TotalEntries)
	}
}

// alarmEvidence: checkout in the north is erroring and slow, while the
// external probe of customer checkout still passes.
var alarmEvidence = map[string]string{
	"alarm_north_checkout_api_errors":        "firing",
	"alarm_north_checkout_api_latency":       "firing",
	"alarm_customer_checkout_external_probe": "quiet",
}

// Method auto must leave exact inference for sampling. (Run may then
// prefer adaptive importance sampling after its pilot; both sample.)
func TestRegionsAutoSamples(t *testing.T) {
	_, net := loadRegions(t)
	r := infer.NewRunner(infer.Options{Workers: 2})
	method, reason, err := r.ChooseMethod(net, infer.MethodAuto)
	if err != nil {
		t.Fatal(err)
	}
	if method != infer.MethodLikelihoodWeighting {
		t.Fatalf("auto chose %q, want %q", method, infer.MethodLikelihoodWeighting)
	}
	t.Logf("auto: %s (%s)", method, reason)
}

func TestRegionsLikelihoodWeightingWithAlarms(t *testing.T) {
	_, net := loadRegions(t)
	r := infer.NewRunner(infer.Options{Workers: 2})
	seed := uint64(5)
	targets := []string{"north_checkout_api", "north_orders_db", "north_checkout_api_bad_deploy", "north_auth", "north_a_site_power"}
	res, err := r.Run(context.Background(), net, &infer.Query{Method: infer.MethodLikelihoodWeighting, Evidence: alarmEvidence,
		Targets: targets, Seed: &seed, Stop: infer.StopRule{MaxSamples: 4096}}, nil)
	if err != nil {
		t.Fatal(err)
	}
	if res.Samples != 4096 || !(res.EffectiveSamples > 0) {
		t.Errorf("%d samples, %g effective; want 4096 and some", res.Samples, res.EffectiveSamples)
	}
	pe := res.EvidenceProbability
	if pe == nil || !finiteInterval(pe.P, pe.Lo, pe.Hi) || !(pe.Lo > 0) {
		t.Fatalf("P(evidence) = %+v, want a finite interval above 0", pe)
	}
	for _, name := range targets {
		m, ok := res.Marginals[name]
		if !ok {
			t.Fatalf("no marginal for %s", name)
		}
		sum := 0.0
		for state, iv := range m {
			if !finiteInterval(iv.P, iv.Lo, iv.Hi) {
				t.Errorf("%s=%s: interval %+v is not a finite interval in [0, 1] around p", name, state, iv)
			}
			sum += iv.P
		}
		if math.Abs(sum-1) > 1e-9 {
			t.Errorf("%s: probabilities add up to %g", name, sum)
		}
	}
}

func finiteInterval(p, lo, hi float64) bool {
	for _, x := range []float64{p, lo, hi} {
		if math.IsNaN(x) || math.IsInf(x, 0) {
			return false
		}
	}
	return 0 <= lo && lo <= p && p <= hi && hi <= 1 && hi > lo
}

// A check against a closed form: with a single alarm observed whose parent
// is a root event, Bayes' rule gives P(evidence) and the posterior of the
// root from the document's own numbers: p = 1 - exp(-λt) for the constant
// failure rate (the exponential law, common practice), the alarm's
// false-alarm rate f and miss rate m:
// P(firing) = p(1-m) + (1-p)f and P(lost | firing) = p(1-m) / P(firing).
// Both must lie inside the sampler's 99.9% intervals (a correct sampler
// misses each with probability about 0.001; the seed is fixed).
func TestRegionsAlarmPosteriorClosedForm(t *testing.T) {
	doc, net := loadRegions(t)
	const root, alarm = "north_a_utility_feed", "alarm_north_a_utility_lost"
	var lambda, mission, falseAlarm, miss float64
	for _, v := range doc.Variables {
		switch v.Name {
		case root:
			lambda, mission = v.FailureRate.Lambda, v.FailureRate.MissionTime
		case alarm:
			falseAlarm, miss = v.Table[0][1], v.Table[1][0]
		}
	}
	if lambda == 0 || falseAlarm == 0 || miss == 0 {
		t.Fatalf("%s or %s not found with a failure rate and alarm table", root, alarm)
	}
	p := -math.Expm1(-lambda * mission)
	wantE := p*(1-miss) + (1-p)*falseAlarm
	wantPost := p * (1 - miss) / wantE

	seed := uint64(3)
	res, err := infer.NewRunner(infer.Options{Workers: 2}).Run(context.Background(), net, &infer.Query{
		Method: infer.MethodLikelihoodWeighting, Evidence: map[string]string{alarm: "firing"}, Targets: []string{root},
		Seed: &seed, Stop: infer.StopRule{MaxSamples: 8192, Confidence: 0.999}}, nil)
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("closed form P(e)=%.6g post=%.6g; got %+v %+v ess %g", wantE, wantPost, res.EvidenceProbability, res.Marginals[root]["lost"], res.EffectiveSamples)
	if pe := res.EvidenceProbability; pe == nil || wantE < pe.Lo || wantE > pe.Hi {
		t.Errorf("P(%s=firing): interval %+v misses the closed form %.6g", alarm, pe, wantE)
	}
	if iv := res.Marginals[root]["lost"]; wantPost < iv.Lo || wantPost > iv.Hi {
		t.Errorf("P(%s=lost | alarm): interval %+v misses the closed form %.6g", root, iv, wantPost)
	}
}
