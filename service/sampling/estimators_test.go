package sampling

import (
	"fmt"
	"math"
	"strings"
	"testing"

	"github.com/beliefd/beliefd/service/model"
	"gonum.org/v1/gonum/stat/distuv"
)

// Rejection sampling's acceptance rate estimates P(evidence): after 4
// million draws the interval at 1 - 1e-4 confidence covers the published
// value (Lauritzen & Spiegelhalter 1988), and the point estimate is the
// acceptance rate.
func TestRejectionAcceptanceRateConverges(t *testing.T) {
	net := chestClinic(t)
	ev := resolve(t, net, chestHard, nil)
	est := mustRun(t, net, ev, nil, Options{Method: MethodRejection, Seed: 5, Stop: Stop{MaxSamples: 4_000_000, Confidence: 1 - 1e-4}})
	iv := *est.Evidence
	if iv.Lo > chestPE || iv.Hi < chestPE {
		t.Errorf("P(evidence) interval [%v, %v] misses %v", iv.Lo, iv.Hi, chestPE)
	}
	if iv.P != est.AcceptanceRate {
		t.Errorf("P(evidence) %v differs from the acceptance rate %v without soft evidence", iv.P, est.AcceptanceRate)
	}
	// Half-width of a binomial proportion at 4e6 draws: z·sqrt(p(1-p)/n)
	// with z(1e-4) = 3.89 is 1.3e-4 (normal approximation, common practice);
	// Wilson's is within a few percent of that.
	if hw := iv.HalfWidth(); hw > 1.1*3.891*math.Sqrt(chestPE*(1-chestPE)/4e6) {
		t.Errorf("half-width %v larger than the binomial standard error implies", hw)
	}
	if math.Abs(est.Log10Evidence-math.Log10(iv.P)) > 1e-15 {
		t.Errorf("Log10Evidence %v for P %v", est.Log10Evidence, iv.P)
	}
}

// The mean weight is an unbiased estimate of P(evidence) for any sample
// size (Fung & Chang 1990; Shachter & Peot 1990): the average over many
// seeds of tiny runs lies within a z-bound (false-failure rate 1e-4) of the
// exact value, using the spread between seeds as the standard error.
func TestLikelihoodWeightingEvidenceUnbiased(t *testing.T) {
	net := chestClinic(t)
	soft := newRandomCase(t, 22, true)
	cases := []struct {
		name  string
		net   *model.Network
		ev    *model.Evidence
		exact float64
	}{
		{"chest clinic (published P(e))", net, resolve(t, net, chestHard, nil), chestPE},
		{"random network with soft evidence (enumeration)", soft.net, soft.ev, soft.exact.pe},
	}
	const seeds, n = 4000, 8
	z := twoSidedZ(1e-4)
	for _, c := range cases {
		k, err := NewKernel(c.net, c.ev, MethodLikelihoodWeighting, nil)
		if err != nil {
			t.Fatal(err)
		}
		st := k.NewStats()
		var sum, sum2 float64
		for s := range seeds {
			k.RunBlock(uint64(s), 0, n, st)
			p := k.Summarize(st, Stop{}).Evidence.P
			sum += p
			sum2 += p * p
		}
		mean := sum / seeds
		sd := math.Sqrt((sum2 - sum*mean) / (seeds - 1))
		se := sd / math.Sqrt(seeds)
		t.Logf("%s: mean %v, exact %v, se %v", c.name, mean, c.exact, se)
		if math.Abs(mean-c.exact) > z*se {
			t.Errorf("%s: mean of %d estimates %v is %.1f standard errors from %v", c.name, seeds, mean, math.Abs(mean-c.exact)/se, c.exact)
		}
	}
}

// Monte Carlo error falls like 1/sqrt(N). With S independent seeds at N and
// at 16N samples, and errors close to normal (central limit theorem), the
// mean squared errors are σ²/N·χ²_S/S and σ²/(16N)·χ²_S/S, so
// (RMS(N)/RMS(16N))² / 16 follows the F(S, S) distribution. The test fails
// when the ratio leaves the F band at a two-sided false-failure rate of
// 1e-4.
func TestErrorFallsAsInverseSqrtN(t *testing.T) {
	net := chestClinic(t)
	ev := resolve(t, net, chestHard, nil)
	bronc := indexOf(t, net, "bronc")
	rc := newRandomCase(t, 22, true) // P(evidence) 0.36: about 180 accepted per run at N = 500
	const seeds = 150
	f := distuv.F{D1: seeds, D2: seeds}
	lo, hi := 4*math.Sqrt(f.Quantile(0.5e-4)), 4*math.Sqrt(f.Quantile(1-0.5e-4))
	cases := []struct {
		name   string
		method string
		net    *model.Network
		ev     *model.Evidence
		target int
		exact  float64
		n      int64
	}{
		{"forward, bronc", MethodForward, net, nil, bronc, chestPrior["bronc"], 500},
		{"likelihood weighting, bronc | asia, dysp", MethodLikelihoodWeighting, net, ev, bronc, chestPost["bronc"], 500},
		{"rejection, random network with soft evidence", MethodRejection, rc.net, rc.ev, 0, rc.exact.marg[0][1], 500},
	}
	for _, c := range cases {
		rms := func(n int64, firstSeed uint64) float64 {
			ss := 0.0
			for s := range uint64(seeds) {
				est := mustRun(t, c.net, c.ev, []int{c.target}, Options{Method: c.method, Seed: firstSeed + s, Workers: 1, Stop: Stop{MaxSamples: n}})
				d := est.Marginals[0][1].P - c.exact
				ss += d * d
			}
			return math.Sqrt(ss / seeds)
		}
		small, large := rms(c.n, 1000), rms(16*c.n, 2000) // disjoint seeds: independent runs
		ratio := small / large
		t.Logf("%s: RMS %v at N=%d, %v at 16N; ratio %.2f (band [%.2f, %.2f])", c.name, small, c.n, large, ratio, lo, hi)
		if ratio < lo || ratio > hi {
			t.Errorf("%s: RMS error ratio %.2f between N and 16N outside [%.2f, %.2f]", c.name, ratio, lo, hi)
		}
	}
}

// Soft evidence: both weighting and rejection agree with enumeration that
// multiplies the joint by the likelihood vectors (Pearl 1988, virtual
// evidence). Likelihoods above 1 check the rejection sampler's rescaling
// by the largest likelihood. One long run each, with intervals at a
// confidence of 1 - 1e-4 split over the checks.
func TestSoftEvidenceAgainstEnumeration(t *testing.T) {
	net := randomNet(31, 7, 0.1)
	ev := net.NoEvidence()
	ev.Hard[5] = 0
	ev.Soft[2] = []float64{2, 0.5, 3}[:net.Vars[2].Card()]
	ev.Soft[4] = []float64{0.1, 0.9, 0.4}[:net.Vars[4].Card()]
	ev.Soft[6] = []float64{1.5, 0.25, 0.8}[:net.Vars[6].Card()]
	exact := enumerate(t, net, ev)
	targets, err := net.ResolveTargets(nil, ev)
	if err != nil {
		t.Fatal(err)
	}
	checks := 1
	for _, v := range targets {
		checks += net.Vars[v].Card()
	}
	conf := 1 - 1e-4/float64(checks)
	likScale := 1.0
	for _, l := range ev.Soft {
		if l != nil {
			m := 0.0
			for _, x := range l {
				m = math.Max(m, x)
			}
			likScale *= m
		}
	}
	for _, method := range []string{MethodLikelihoodWeighting, MethodRejection} {
		est := mustRun(t, net, ev, targets, Options{Method: method, Seed: 8, Stop: Stop{MaxSamples: 200_000, Confidence: conf}})
		noNaN(t, est)
		for i, v := range targets {
			for s, p := range exact.marg[v] {
				if iv := est.Marginals[i][s]; iv.Lo > p || iv.Hi < p {
					t.Errorf("%s: v%d=s%d interval [%v, %v] misses the exact %v", method, v, s, iv.Lo, iv.Hi, p)
				}
			}
		}
		if iv := est.Evidence; iv.Lo > exact.pe || iv.Hi < exact.pe {
			t.Errorf("%s: P(evidence) interval [%v, %v] misses the exact %v", method, iv.Lo, iv.Hi, exact.pe)
		}
		if method == MethodRejection && math.Abs(est.Evidence.P-est.AcceptanceRate*likScale) > 1e-15 {
			t.Errorf("rejection: P(evidence) %v is not the acceptance rate %v times %v", est.Evidence.P, est.AcceptanceRate, likScale)
		}
	}
}

// Evidence that cannot happen (tub = yes with either = no contradicts the
// any-of gate) gives zero accepted samples or zero weights, a plain warning
// and an upper bound, never NaN. Rule of three (Hanley & Lippman-Hand 1983):
// with no success in n trials the 95% upper bound is about 3/n; the Wilson
// bound for 0/n is z²/(n+z²) ≈ 3.84/n.
func TestImpossibleEvidence(t *testing.T) {
	net := chestClinic(t)
	ev := resolve(t, net, map[string]string{"tub": "yes", "either": "no"}, nil)
	const n = 10_000
	z := TwoSidedZ(0.95)
	for _, method := range []string{MethodRejection, MethodLikelihoodWeighting} {
		want := z * z / (n + z*z)
		if method == MethodLikelihoodWeighting {
			// No weight exceeds the largest P(tub = yes | asia) = 0.05
			// (times P(either = no | ...) <= 1), so P(e) <= 0.05·P(w > 0).
			want *= 0.05
		}
		est := mustRun(t, net, ev, nil, Options{Method: method, Seed: 1, Stop: Stop{MaxSamples: n}})
		noNaN(t, est)
		if est.Samples != n || est.StopReason != ReasonMaxSamples {
			t.Errorf("%s: %d samples, reason %q", method, est.Samples, est.StopReason)
		}
		if est.Evidence.P != 0 || est.Evidence.Lo != 0 || math.Abs(est.Evidence.Hi-want) > 1e-12 {
			t.Errorf("%s: P(evidence) %+v, want [0, %v]", method, *est.Evidence, want)
		}
		if !math.IsInf(est.Log10Evidence, -1) {
			t.Errorf("%s: Log10Evidence = %v", method, est.Log10Evidence)
		}
		for _, m := range est.Marginals {
			for _, iv := range m {
				if iv.Lo != 0 || iv.Hi != 1 {
					t.Errorf("%s: marginal %+v without samples, want [0, 1]", method, iv)
				}
			}
		}
		wantWarn := fmt.Sprintf("in %d draws", n)
		if len(est.Warnings) != 1 || !strings.Contains(est.Warnings[0], wantWarn) || !strings.Contains(est.Warnings[0], fmt.Sprintf("%.3g", want)) {
			t.Errorf("%s: warnings %q", method, est.Warnings)
		}
	}
}

// The reported effective sample size and largest weight share follow
// their definitions (Kish 1965, Survey Sampling: n_eff = (Σw)²/Σw²)
// computed here from the weights of each sample, drawn by a separate
// single-sample loop over the same random stream.
func TestWeightDiagnostics(t *testing.T) {
	net := chestClinic(t)
	ev := resolve(t, net, map[string]string{"xray": "yes", "dysp": "yes"}, nil)
	k, err := NewKernel(net, ev, MethodLikelihoodWeighting, nil)
	if err != nil {
		t.Fatal(err)
	}
	st := k.NewStats()
	const n = 500
	k.RunBlock(3, 4, n, st)
	ws := referenceWeights(net, ev, 3, 4, n)
	var sw, sw2, mx float64
	for _, w := range ws {
		sw += w
		sw2 += w * w
		mx = math.Max(mx, w)
	}
	est := k.Summarize(st, Stop{})
	if math.Abs(est.EffectiveSamples-sw*sw/sw2) > 1e-9*est.EffectiveSamples {
		t.Errorf("ESS %v, want %v", est.EffectiveSamples, sw*sw/sw2)
	}
	if math.Abs(est.MaxWeightShare-mx/sw) > 1e-12 {
		t.Errorf("MaxWeightShare %v, want %v", est.MaxWeightShare, mx/sw)
	}
	if math.Abs(est.Evidence.P-sw/n) > 1e-15 {
		t.Errorf("P(evidence) %v, want mean weight %v", est.Evidence.P, sw/n)
	}
	// Few samples: one dominant weight is reported.
	k.RunBlock(3, 4, 3, st)
	if est := k.Summarize(st, Stop{}); len(est.Warnings) == 0 {
		t.Errorf("no warning with 3 samples and weight share %v", est.MaxWeightShare)
	}
}

// referenceWeights is a plain likelihood-weighting loop over model.Network
// (no flattening), drawing states by inversion from the same stream as the
// kernel: u < cumulative probability. It returns each sample's weight.
func referenceWeights(net *model.Network, ev *model.Evidence, seed uint64, block int64, n int) []float64 {
	r := NewStream(seed, uint64(block))
	x := make([]int, len(net.Vars))
	out := make([]float64, n)
	for i := range out {
		w := 1.0
		for v := range net.Vars {
			nd := &net.Vars[v]
			row := 0
			for j, p := range nd.Parents {
				row += x[p] * nd.Strides[j]
			}
			probs := nd.Row(row)
			if e := ev.Hard[v]; e >= 0 {
				x[v] = e
				w *= probs[e]
				continue
			}
			u, c := r.Float64(), 0.0
			x[v] = len(probs) - 1
			for s, p := range probs {
				c += p
				if u < c {
					x[v] = s
					break
				}
			}
		}
		out[i] = w
	}
	return out
}
