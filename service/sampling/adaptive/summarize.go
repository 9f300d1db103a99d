package adaptive

import (
	"fmt"
	"math"

	"github.com/beliefd/beliefd/service/sampling"
)

// Result is what a run reports: the estimate in the samplers' common
// shape, and what only this sampler knows.
type Result struct {
	// Estimate holds the marginals (a rare-state track's state is reported
	// as the ratio P(state, evidence)/P(evidence)), P(evidence), the main
	// track's effective sample size and largest-weight share, the samples
	// of all tracks and the warnings.
	Estimate *sampling.Estimate
	// Tracks describes every track, the main one first.
	Tracks []TrackReport
	// Learning describes the learning phase.
	Learning LearningReport
	// EpsDelta is the outcome of the (ε, δ) rule when it was asked for.
	EpsDelta *EpsDeltaReport
}

// TrackReport describes one track.
type TrackReport struct {
	// Variable and State name the extra evidence of a rare-state track
	// (indices into the network; -1 for the main track).
	Variable, State int
	// Joint is P(evidence) for the main track and P(evidence, Variable =
	// State) for a rare-state track, at the run's confidence; Log10Joint is
	// log10 of its estimate (-Inf when 0), correct even where Joint.P
	// underflows.
	Joint      sampling.Interval
	Log10Joint float64
	// Conditional is P(Variable = State | evidence) (rare-state tracks).
	Conditional *sampling.Interval
	Samples     int64
	// EffectiveSamples is Kish's (Σw)²/Σw²; MaxWeightShare is the largest
	// weight over Σw; ParetoK is the generalized Pareto tail-shape
	// estimate of the weights (NaN when it cannot be estimated).
	EffectiveSamples float64
	MaxWeightShare   float64
	ParetoK          float64
}

// Summarize turns merged statistics into a result with intervals at
// stop's confidence. Seed, StopReason and Elapsed are left for the caller.
func (s *Sampler) Summarize(st *Stats, stop sampling.Stop) *Result {
	conf := confidenceOf(stop)
	res := &Result{Learning: s.learn}
	est := &sampling.Estimate{Method: Method}
	res.Estimate = est
	main := &st.Tracks[0]
	ivs := s.intervals(st, conf, nil)
	est.Marginals = make([][]sampling.Interval, len(s.targets))
	for i, t := range s.targets {
		off := int(s.tOff[i])
		c := s.net.Vars[t].Card()
		est.Marginals[i] = ivs[off : off+c : off+c]
	}
	for i := range st.Tracks {
		est.Samples += st.Tracks[i].N
	}
	if main.N > 0 {
		est.AcceptanceRate = float64(main.Accepted) / float64(main.N)
	}
	if main.SumW2 > 0 {
		est.EffectiveSamples = main.SumW * main.SumW / main.SumW2
	}
	if main.SumW > 0 {
		est.MaxWeightShare = main.MaxW / main.SumW
	}
	est.Log10Evidence = 0
	for i, t := range s.tracks {
		ts := &st.Tracks[i]
		joint, l10 := s.jointInterval(i, ts, conf)
		tr := TrackReport{Variable: t.v, State: t.state, Joint: joint, Log10Joint: l10, Samples: ts.N, ParetoK: paretoK(ts.Top, ts.N)}
		if ts.SumW2 > 0 {
			tr.EffectiveSamples = ts.SumW * ts.SumW / ts.SumW2
		}
		if ts.SumW > 0 {
			tr.MaxWeightShare = ts.MaxW / ts.SumW
		}
		if i > 0 {
			c := s.conditional(st, i, conf)
			tr.Conditional = &c
		}
		res.Tracks = append(res.Tracks, tr)
	}
	if s.hasEv {
		iv := res.Tracks[0].Joint
		est.Evidence = &iv
		est.Log10Evidence = res.Tracks[0].Log10Joint
	}
	if s.opt.EpsDelta != nil {
		res.EpsDelta = s.epsDeltaReport(st, res)
	}
	est.Warnings = s.warnings(st, res, conf)
	return res
}

func confidenceOf(stop sampling.Stop) float64 {
	if stop.Confidence > 0 && stop.Confidence < 1 {
		return stop.Confidence
	}
	return sampling.DefaultConfidence
}

// meanVar returns the mean of a track's stored weights and the estimated
// variance of that mean.
func meanVar(ts *TrackStats) (mean, varMean float64) {
	if ts.N <= 0 {
		return 0, math.Inf(1)
	}
	n := float64(ts.N)
	mean = ts.SumW / n
	if ts.N < 2 {
		return mean, math.Inf(1)
	}
	v := math.Max(0, (ts.SumW2-ts.SumW*mean)/(n-1))
	return mean, v / n
}

// jointInterval is the track's mean weight (P(evidence) or P(evidence,
// state)) with its normal interval, clipped to [0, bound on the weights],
// and log10 of the estimate.
func (s *Sampler) jointInterval(i int, ts *TrackStats, conf float64) (sampling.Interval, float64) {
	t := s.tracks[i]
	bound := math.Exp2(t.log2Max)
	ref := t.log2Ref
	if i == 0 && !s.hasEv {
		return sampling.Interval{P: 1, Lo: 1, Hi: 1}, 0
	}
	if ts.SumW <= 0 || ts.N < 2 {
		// No positive weight: P(w > 0) is below the score bound and no
		// weight exceeds the bound.
		hi := sampling.Wilson(0, float64(ts.N), conf).Hi * bound
		if ts.SumW > 0 {
			hi = bound
		}
		p := 0.0
		if ts.N > 0 {
			p = ts.SumW / float64(ts.N)
		}
		return sampling.Interval{P: math.Ldexp(p, ref), Lo: 0, Hi: math.Ldexp(math.Min(hi, bound), ref)}, log10Scaled(p, ref)
	}
	mean, vm := meanVar(ts)
	iv := sampling.NormalInterval(mean, math.Sqrt(vm), conf, 0, bound)
	slack := roundingSlack(ts.N, mean)
	// Samples of weight 0 that the zero-support floor may waste are too
	// rare to be seen: the mean of the others is up to 1/(1-waste) too high.
	iv.Lo, iv.Hi = math.Max(0, iv.Lo*(1-t.waste)-slack), math.Min(bound, iv.Hi+slack)
	return sampling.Interval{P: math.Ldexp(iv.P, ref), Lo: math.Ldexp(iv.Lo, ref), Hi: math.Min(1, math.Ldexp(iv.Hi, ref))}, log10Scaled(mean, ref)
}

func b2f(b bool) float64 {
	if b {
		return 1
	}
	return 0
}

func log10Scaled(x float64, ref int) float64 {
	if x <= 0 {
		return math.Inf(-1)
	}
	return math.Log10(x) + float64(ref)*math.Log10(2)
}

// conditional is P(state | evidence) of rare track i: the ratio of the
// track's mean weight to the main track's, two independent estimates,
// with Fieller's interval for a ratio of independent normal estimates
// (Fieller 1954, JRSS-B 16:175-185), clipped to [0, 1].
func (s *Sampler) conditional(st *Stats, i int, conf float64) sampling.Interval {
	z := sampling.TwoSidedZ(conf)
	ta, tb := s.tracks[i], s.tracks[0]
	a, va := meanVar(&st.Tracks[i])
	b, vb := 1.0, 0.0
	scale := ta.log2Ref // ratio = (a·2^refA)/(b·2^refB)
	if s.hasEv {
		b, vb = meanVar(&st.Tracks[0])
		scale -= tb.log2Ref
	}
	if ta.impossible {
		return sampling.Interval{}
	}
	if st.Tracks[i].SumW <= 0 || st.Tracks[i].N < 2 {
		joint, _ := s.jointInterval(i, &st.Tracks[i], conf)
		den := 1.0
		if s.hasEv {
			mb, _ := s.jointInterval(0, &st.Tracks[0], conf)
			den = mb.Lo
		}
		hi := 1.0
		if den > 0 {
			hi = math.Min(1, joint.Hi/den)
		}
		return sampling.Interval{P: 0, Lo: 0, Hi: hi}
	}
	if !(b > 0) {
		return sampling.Interval{P: 0, Lo: 0, Hi: 1}
	}
	p := math.Min(1, math.Ldexp(a/b, scale))
	lo, hi, ok := fieller(a, va, b, vb, z)
	if !ok {
		return sampling.Interval{P: p, Lo: 0, Hi: 1}
	}
	slack := roundingSlack(st.Tracks[i].N, a/b)
	hi /= 1 - math.Min(0.5, tb.waste*b2f(s.hasEv)) // see jointInterval
	lo = math.Max(0, math.Ldexp((lo-slack)*(1-ta.waste), scale))
	hi = math.Min(1, math.Ldexp(hi+slack, scale))
	return sampling.Interval{P: p, Lo: math.Min(lo, p), Hi: math.Max(hi, p)}
}

// fieller returns the Fieller interval for a/b where a and b are
// independent, approximately normal estimates with variances va and vb:
// the R with (a - R b)² ≤ z² (va + R² vb). ok is false when b is not
// significantly different from 0 (the set is unbounded).
func fieller(a, va, b, vb, z float64) (lo, hi float64, ok bool) {
	z2 := z * z
	qa := b*b - z2*vb
	if !(qa > 0) {
		return 0, 0, false
	}
	// Discriminant / 4 = z²(a² vb + va·qa) ≥ 0.
	d := z2 * (a*a*vb + va*qa)
	if d < 0 || math.IsNaN(d) {
		return 0, 0, false
	}
	r := math.Sqrt(d)
	return (a*b - r) / qa, (a*b + r) / qa, true
}

// intervals returns the interval of every target state: clamped targets
// exactly, rare-tracked states by their ratio, the rest self-normalised
// from the main track.
func (s *Sampler) intervals(st *Stats, conf float64, buf []sampling.Interval) []sampling.Interval {
	buf = buf[:0]
	z := sampling.TwoSidedZ(conf)
	m := &st.Tracks[0]
	ess := 0.0
	if m.SumW2 > 0 {
		ess = m.SumW * m.SumW / m.SumW2
	}
	for i, t := range s.targets {
		off := int(s.tOff[i])
		c := s.net.Vars[t].Card()
		if e := s.clamped[i]; e >= 0 {
			for j := 0; j < c; j++ {
				p := 0.0
				if j == e {
					p = 1
				}
				buf = append(buf, sampling.Interval{P: p, Lo: p, Hi: p})
			}
			continue
		}
		nonzero := 0
		for j := 0; j < c; j++ {
			if m.StateW[off+j] > 0 {
				nonzero++
			}
		}
		for j := 0; j < c; j++ {
			buf = append(buf, weightedInterval(m.StateW[off+j], m.StateW2[off+j], m.SumW, m.SumW2, ess, nonzero, z, conf))
		}
	}
	for i := 1; i < len(s.tracks); i++ {
		t := s.tracks[i]
		ti := s.targetIndex(t.v)
		if ti < 0 {
			continue
		}
		buf[int(s.tOff[ti])+t.state] = s.conditional(st, i, conf)
	}
	return buf
}

// weightedInterval is the self-normalised estimate a/sumW of one state
// with the variance of a ratio estimator by the delta method (Hesterberg
// 1995, Technometrics 37:185-194; Owen 2013, Monte Carlo theory, methods
// and examples, ch. 9): var ≈ Σ w²(I − p)² / (Σw)², turned into a score
// interval at the matching effective sample size. A state never seen (or
// the only one seen) is widened to the Wilson bound at the effective
// sample size, as for likelihood weighting.
func weightedInterval(a, a2, sumW, sumW2, ess float64, nonzero int, z, conf float64) sampling.Interval {
	if sumW <= 0 {
		return sampling.Interval{P: 0, Lo: 0, Hi: 1}
	}
	p := a / sumW
	if a > 0 && nonzero == 1 {
		p = 1
	}
	rest := math.Max(0, sumW2-a2)
	v := ((1-p)*(1-p)*a2 + p*p*rest) / (sumW * sumW)
	slack := roundingSlack(int64(ess)+1, p)
	half := z*math.Sqrt(v) + slack
	iv := sampling.Interval{P: p, Lo: math.Max(0, p-half), Hi: math.Min(1, p+half)}
	if v > 0 && p > 0 && p < 1 {
		// The score (Wilson) form at the effective sample size of this
		// proportion, n* = p(1-p)/var, which is the delta-method variance
		// with the skew of small proportions taken into account (the
		// design-effect adjusted Wilson interval of survey sampling, Korn &
		// Graubard 1998, from memory); with equal weights it is Wilson's.
		// n* is capped at Kish's effective sample size of the whole
		// sample: a rare state the importance function over-samples has
		// light weights on its few hits, whose own variance then claims
		// more than the sample holds (see the package comment).
		n := math.Min(p*(1-p)/v, ess)
		w := sampling.Wilson(p*n, n, conf)
		iv.Lo, iv.Hi = math.Max(0, w.Lo-slack), math.Min(1, w.Hi+slack)
	}
	if a <= 0 {
		iv.Hi = math.Max(iv.Hi, sampling.Wilson(0, ess, conf).Hi)
	} else if nonzero == 1 {
		iv.Lo = math.Min(iv.Lo, sampling.Wilson(ess, ess, conf).Lo)
	}
	return iv
}

// roundingSlack bounds the rounding error of a mean of n terms near x
// (n·2^-52·|x|; Higham 2002, Accuracy and Stability of Numerical
// Algorithms, §4.2).
func roundingSlack(n int64, x float64) float64 {
	return float64(n) * 0x1p-52 * math.Abs(x)
}

// precisionIntervals lists what precision rules look at: every state of
// every target without hard evidence, and P(evidence) when there is
// evidence.
func (s *Sampler) precisionIntervals(st *Stats, conf float64, buf []sampling.Interval) []sampling.Interval {
	all := s.intervals(st, conf, buf[:0])
	out := all[:0]
	for i, t := range s.targets {
		if s.clamped[i] >= 0 {
			continue
		}
		off := int(s.tOff[i])
		out = append(out, all[off:off+s.net.Vars[t].Card()]...)
	}
	if s.hasEv {
		iv, _ := s.jointInterval(0, &st.Tracks[0], conf)
		out = append(out, iv)
	}
	return out
}

// Thresholds of the warnings about uneven weights (common practice, as
// for likelihood weighting).
const (
	lowESSRatio   = 0.01
	dominantShare = 0.1
)

func (s *Sampler) trackName(i int) string {
	t := s.tracks[i]
	if t.v < 0 {
		return "the main importance function"
	}
	x := &s.net.Vars[t.v]
	return fmt.Sprintf("the track of %s=%s", x.Name, x.States[t.state])
}

func (s *Sampler) warnings(st *Stats, res *Result, conf float64) []string {
	var w []string
	if st.Tracks[0].N == 0 {
		return append(w, "no samples were drawn")
	}
	pct := conf * 100
	for i, tr := range res.Tracks {
		ts := &st.Tracks[i]
		name := s.trackName(i)
		if s.tracks[i].impossible {
			w = append(w, fmt.Sprintf("propagation shows that %s is impossible given the evidence: its probability is 0", name[len("the track of "):]))
			continue
		}
		if ts.SumW <= 0 {
			w = append(w, fmt.Sprintf("every sample of %s had weight 0 in %d draws; its probability is below %.3g at %g%% confidence",
				name, ts.N, tr.Joint.Hi, pct))
			continue
		}
		if k := tr.ParetoK; k > ParetoKWarn {
			w = append(w, fmt.Sprintf("the weights of %s look heavy-tailed (Pareto k̂ = %.2f > %.1f): the intervals may be too narrow; more learning or another method is needed",
				name, k, ParetoKWarn))
		}
		if i == 0 && s.hasEv && tr.EffectiveSamples < lowESSRatio*float64(ts.N) {
			w = append(w, fmt.Sprintf("the effective sample size of %s is %.3g of %d samples: the weights are very uneven, so the intervals may be too narrow",
				name, tr.EffectiveSamples, ts.N))
		}
		if tr.MaxWeightShare > dominantShare {
			w = append(w, fmt.Sprintf("one sample of %s carries %.0f%% of its total weight: the estimate rests on very few samples",
				name, 100*tr.MaxWeightShare))
		}
	}
	if ed := res.EpsDelta; ed != nil {
		w = append(w, ed.Notes...)
	}
	return w
}
