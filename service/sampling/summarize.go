package sampling

import (
	"fmt"
	"math"
)

// Summarize turns merged statistics into an estimate whose intervals have
// stop's confidence (DefaultConfidence when zero). Seed, StopReason and
// Elapsed are left for the caller, who knows them.
func (k *Kernel) Summarize(s *Stats, stop Stop) *Estimate {
	conf := confidenceOf(stop)
	est := &Estimate{Method: k.method, Samples: s.N, Log10Evidence: 0}
	ivs := k.intervals(s, conf, make([]Interval, k.states))
	est.Marginals = make([][]Interval, len(k.targets))
	for i, t := range k.targets {
		off := int(k.tOff[i])
		est.Marginals[i] = ivs[off : off+k.net.Vars[t].Card() : off+k.net.Vars[t].Card()]
	}
	if s.N > 0 {
		est.AcceptanceRate = float64(s.Accepted) / float64(s.N)
	}
	switch k.method {
	case MethodForward:
		est.EffectiveSamples = float64(s.N)
	case MethodRejection:
		est.EffectiveSamples = float64(s.Accepted)
	case MethodLikelihoodWeighting:
		if s.SumW2 > 0 {
			est.EffectiveSamples = s.SumW * s.SumW / s.SumW2
		}
		if s.SumW > 0 {
			est.MaxWeightShare = s.MaxW / s.SumW
		}
	}
	if iv, ok := k.evidenceInterval(s, conf); ok {
		est.Evidence = &iv
		est.Log10Evidence = math.Log10(iv.P)
	}
	est.Warnings = k.warnings(s, est, conf)
	return est
}

// StopReason tells whether a run whose merged statistics are s has
// finished under stop (which should be normalised): ReasonAbsErr or
// ReasonRelErr when every target interval and, with evidence, the
// P(evidence) interval meet the precision rule; ReasonMaxSamples when
// stop.MaxSamples samples were drawn; "" otherwise. The clock rules
// (Timeout, cancellation) are the caller's.
func (k *Kernel) StopReason(s *Stats, stop Stop) string {
	return k.stopReason(s, stop, nil)
}

func (k *Kernel) stopReason(s *Stats, stop Stop, buf []Interval) string {
	if stop.AbsErr > 0 || stop.RelErr > 0 {
		if r := stop.PrecisionMet(k.precisionIntervals(s, confidenceOf(stop), buf)); r != "" {
			return r
		}
	}
	if stop.MaxSamples > 0 && s.N >= stop.MaxSamples {
		return ReasonMaxSamples
	}
	return ""
}

// precisionIntervals lists the intervals precision rules look at: every
// state of every target without hard evidence (the others are known
// exactly), and P(evidence) when there is evidence.
func (k *Kernel) precisionIntervals(s *Stats, conf float64, buf []Interval) []Interval {
	all := k.intervals(s, conf, buf[:0])
	out := all[:0]
	for i, t := range k.targets {
		if k.clamped[i] >= 0 {
			continue
		}
		off := int(k.tOff[i])
		out = append(out, all[off:off+k.net.Vars[t].Card()]...)
	}
	if iv, ok := k.evidenceInterval(s, conf); ok {
		out = append(out, iv)
	}
	return out
}

func confidenceOf(stop Stop) float64 {
	if stop.Confidence > 0 && stop.Confidence < 1 {
		return stop.Confidence
	}
	return DefaultConfidence
}

// intervals appends the interval of every target state to buf[:0].
func (k *Kernel) intervals(s *Stats, conf float64, buf []Interval) []Interval {
	buf = buf[:0]
	z := TwoSidedZ(conf)
	ess := 0.0
	if s.SumW2 > 0 {
		ess = s.SumW * s.SumW / s.SumW2
	}
	for i, t := range k.targets {
		off := int(k.tOff[i])
		card := k.net.Vars[t].Card()
		if e := k.clamped[i]; e >= 0 {
			for j := 0; j < card; j++ {
				p := 0.0
				if j == e {
					p = 1
				}
				buf = append(buf, Interval{P: p, Lo: p, Hi: p})
			}
			continue
		}
		switch k.method {
		case MethodForward:
			for j := 0; j < card; j++ {
				buf = append(buf, Wilson(s.StateW[off+j], float64(s.N), conf))
			}
		case MethodRejection:
			for j := 0; j < card; j++ {
				buf = append(buf, Wilson(s.StateW[off+j], float64(s.Accepted), conf))
			}
		default:
			nonzero := 0
			for j := 0; j < card; j++ {
				if s.StateW[off+j] > 0 {
					nonzero++
				}
			}
			for j := 0; j < card; j++ {
				buf = append(buf, weightedInterval(s.StateW[off+j], s.StateW2[off+j], s.SumW, s.SumW2, ess, nonzero, z, conf))
			}
		}
	}
	return buf
}

// weightedInterval is the self-normalised estimate a/sumW of one state with
// its delta-method interval (see the package comment). a and a2 are the
// sums of w and w² over the samples in the state.
func weightedInterval(a, a2, sumW, sumW2, ess float64, nonzero int, z, conf float64) Interval {
	if sumW <= 0 {
		return Interval{P: 0, Lo: 0, Hi: 1}
	}
	p := a / sumW
	if a > 0 && nonzero == 1 {
		p = 1 // the only state seen; the sums agree up to rounding
	}
	if sumW2 == 0 || sumW*sumW == 0 {
		// Weights below about 1e-154 have squares that underflow to 0: no
		// variance can be computed (and 0/0 would be NaN).
		return Interval{P: p, Lo: 0, Hi: 1}
	}
	// sum w²(I-p)² = (1-p)² sum_{I=1} w² + p² sum_{I=0} w², both terms >= 0.
	rest := math.Max(0, sumW2-a2)
	v := ((1-p)*(1-p)*a2 + p*p*rest) / (sumW * sumW)
	half := z*math.Sqrt(v) + roundingSlack(int64(ess)+1, p)
	iv := Interval{P: p, Lo: math.Max(0, p-half), Hi: math.Min(1, p+half)}
	// A state never seen (or the only one seen) has a delta-method interval
	// of width 0; widen it to the score bound for the effective sample size.
	if a <= 0 {
		iv.Hi = math.Max(iv.Hi, Wilson(0, ess, conf).Hi)
	} else if nonzero == 1 {
		iv.Lo = math.Min(iv.Lo, Wilson(ess, ess, conf).Lo)
	}
	return iv
}

// evidenceInterval is the estimate of P(evidence) with its interval, when
// there is evidence.
func (k *Kernel) evidenceInterval(s *Stats, conf float64) (Interval, bool) {
	if !k.hasEvidence {
		return Interval{}, false
	}
	switch k.method {
	case MethodRejection:
		iv := Wilson(float64(s.Accepted), float64(s.N), conf)
		return Interval{P: iv.P * k.likScale, Lo: iv.Lo * k.likScale, Hi: iv.Hi * k.likScale}, true
	case MethodLikelihoodWeighting:
		if s.SumW <= 0 || s.N < 2 {
			// Every weight 0: P(w > 0) is below the score bound, and no
			// weight exceeds maxWeight.
			hi := Wilson(0, float64(s.N), conf).Hi
			if s.SumW > 0 {
				hi = 1
			}
			return Interval{P: s.SumW / math.Max(1, float64(s.N)), Lo: 0, Hi: hi * k.maxWeight}, true
		}
		n := float64(s.N)
		mean := s.SumW / n
		if s.SumW2 == 0 {
			// The squares of the weights underflow: no variance.
			return Interval{P: mean, Lo: 0, Hi: math.Max(mean, k.maxWeight)}, true // mean > maxWeight by rounding only
		}
		variance := math.Max(0, (s.SumW2-s.SumW*mean)/(n-1))
		iv := NormalInterval(mean, math.Sqrt(variance/n), conf, 0, k.maxWeight)
		// With (nearly) constant weights the interval shrinks to the
		// rounding error of the sum, which it must still cover.
		slack := roundingSlack(s.N, mean)
		iv.Lo, iv.Hi = math.Max(0, iv.Lo-slack), math.Min(k.maxWeight, iv.Hi+slack)
		return iv, true
	}
	return Interval{}, false
}

// Thresholds of the warnings about uneven weights (common practice).
const (
	lowESSRatio      = 0.01
	dominantShare    = 0.1
	fewAcceptedLimit = 100
)

func (k *Kernel) warnings(s *Stats, est *Estimate, conf float64) []string {
	var w []string
	if s.N == 0 {
		return append(w, "no samples were drawn")
	}
	pct := conf * 100
	switch k.method {
	case MethodRejection:
		if !k.hasEvidence {
			break
		}
		if s.Accepted == 0 {
			w = append(w, fmt.Sprintf("no sample matched the evidence in %d draws; P(evidence) is below %.3g at %g%% confidence; likelihood weighting wastes fewer samples on unlikely evidence",
				s.N, est.Evidence.Hi, pct))
		} else if s.Accepted < fewAcceptedLimit {
			w = append(w, fmt.Sprintf("only %d of %d samples matched the evidence, so the posterior intervals are wide; likelihood weighting wastes fewer samples on unlikely evidence",
				s.Accepted, s.N))
		}
	case MethodLikelihoodWeighting:
		if s.SumW <= 0 {
			w = append(w, fmt.Sprintf("every sample had weight 0 in %d draws (none was consistent with the evidence); P(evidence) is below %.3g at %g%% confidence",
				s.N, est.Evidence.Hi, pct))
			break
		}
		if s.SumW2 == 0 {
			w = append(w, "the likelihood weights are too small for floating point (below about 1e-154, their squares are 0), so no interval can be computed: the intervals are [0, 1]; exact inference does not have this limit")
			break
		}
		if est.EffectiveSamples < lowESSRatio*float64(s.N) {
			w = append(w, fmt.Sprintf("the effective sample size is %.3g of %d samples: the weights are very uneven, so the intervals may be too narrow",
				est.EffectiveSamples, s.N))
		}
		if est.MaxWeightShare > dominantShare {
			w = append(w, fmt.Sprintf("one sample carries %.0f%% of the total weight: the estimate rests on very few samples",
				100*est.MaxWeightShare))
		}
	}
	return w
}

// roundingSlack bounds the rounding error of a mean of n terms near x
// (n·2^-52·|x|, a worst-case bound for recursive summation; Higham 2002,
// Accuracy and Stability of Numerical Algorithms, §4.2).
func roundingSlack(n int64, x float64) float64 {
	return float64(n) * 0x1p-52 * math.Abs(x)
}
