package adaptive

import (
	"fmt"
	"math"

	"github.com/beliefd/beliefd/service/sampling"
)

// The (ε, δ) rule is the stopping-rule algorithm of Dagum, Karp, Luby &
// Ross, "An optimal algorithm for Monte Carlo estimation", SIAM J. Comput.
// 29(5):1484-1496 (2000): for independent Z_i in [0, 1] with mean μ > 0,
// let Υ = 4(e − 2) ln(2/δ)/ε² and Υ1 = 1 + (1 + ε)Υ; sum the Z_i until the
// sum reaches Υ1, at sample N; then μ̂ = Υ1/N satisfies
// P(μ(1 − ε) ≤ μ̂ ≤ μ(1 + ε)) > 1 − δ. Here Z is a track's weight divided
// by the bound on its weights (the product over variables of the largest
// factor a row can contribute), which is known once the importance
// function is frozen.

// upsilon1 is the threshold Υ1 of the rule.
func upsilon1(e *EpsDelta) float64 {
	ups := 4 * (math.E - 2) * math.Log(2/e.Delta) / (e.Epsilon * e.Epsilon)
	return 1 + (1+e.Epsilon)*ups
}

// dklrUsable reports whether track i's weights have a finite, usable bound.
func (s *Sampler) dklrUsable(i int) bool {
	t := s.tracks[i]
	return !t.impossible && t.log2Max < 1000 && !math.IsNaN(t.log2Max)
}

// epsDeltaMet reports whether every usable track has crossed the threshold
// and no track is unusable.
func (s *Sampler) epsDeltaMet(st *Stats) bool {
	for i := range s.tracks {
		if i == 0 && !s.hasEv {
			continue
		}
		if !s.dklrUsable(i) || st.Tracks[i].Crossed == 0 {
			return false
		}
	}
	return true
}

// markCrossings records, for every track whose scaled sum reached Υ1 in
// the block just merged (number b, statistics blk), the exact sample at
// which it did, by drawing that block's samples of the track again from
// the same stream. prev holds the tracks' sums before the block.
func (s *Sampler) markCrossings(merged *Stats, prev []float64, b int64, blk *Stats) {
	need := upsilon1(s.opt.EpsDelta)
	x := make([]int32, len(s.nodes))
	for i, t := range s.tracks {
		ts := &merged.Tracks[i]
		if ts.Crossed > 0 || !s.dklrUsable(i) || (i == 0 && !s.hasEv) {
			continue
		}
		inv := math.Exp2(-t.log2Max)
		if ts.SumW*inv < need {
			continue
		}
		r := sampling.NewStream(s.opt.Seed, trackStream(i, b))
		fillEvidence(t, x)
		sum := prev[i] * inv
		n := blk.Tracks[i].N
		k := int64(0)
		for k < n {
			w := s.draw(t, &r, x)
			k++
			if w > 0 {
				sum += w * inv
			}
			if sum >= need {
				break
			}
		}
		ts.Crossed = ts.N - n + k
	}
}

// EpsDeltaReport is the outcome of the (ε, δ) rule.
type EpsDeltaReport struct {
	Epsilon, Delta float64
	// Met is set when the rule held on P(evidence) and on every rare-state
	// track's joint probability.
	Met bool
	// Tracks[i] is track i's interval [μ̂/(1+ε), μ̂/(1−ε)], which holds
	// with probability at least 1 − δ, once its rule has held (nil before
	// and for the main track without evidence).
	Tracks []*sampling.Interval
	// ExpectedSamples[i] is about how many samples track i needs: Υ1 times
	// the weight bound over the current estimate (+Inf when unknown).
	ExpectedSamples []float64
	// Notes say what the rule guarantees and when its assumptions fail.
	Notes []string
}

func (s *Sampler) epsDeltaReport(st *Stats, res *Result) *EpsDeltaReport {
	e := s.opt.EpsDelta
	need := upsilon1(e)
	rep := &EpsDeltaReport{Epsilon: e.Epsilon, Delta: e.Delta, Met: s.epsDeltaMet(st),
		Tracks: make([]*sampling.Interval, len(s.tracks)), ExpectedSamples: make([]float64, len(s.tracks))}
	perTrack := float64(s.PerTrackSamples(s.opt.Stop))
	for i, t := range s.tracks {
		ts := &st.Tracks[i]
		name := "P(evidence)"
		if i > 0 {
			x := &s.net.Vars[t.v]
			name = fmt.Sprintf("P(evidence, %s=%s)", x.Name, x.States[t.state])
		} else if !s.hasEv {
			rep.ExpectedSamples[i] = 0
			continue
		}
		if !s.dklrUsable(i) {
			rep.ExpectedSamples[i] = math.Inf(1)
			if t.impossible {
				rep.Notes = append(rep.Notes, fmt.Sprintf("(ε, δ) rule: %s is 0 (impossible), so the rule cannot hold for it", name))
			} else {
				rep.Notes = append(rep.Notes, fmt.Sprintf("(ε, δ) rule: its assumption fails for %s: the weights have no usable bound (2^%.0f)", name, t.log2Max))
			}
			continue
		}
		bound := math.Exp2(t.log2Max)
		mean, _ := meanVar(ts)
		rep.ExpectedSamples[i] = math.Inf(1)
		if mean > 0 {
			rep.ExpectedSamples[i] = need * bound / mean
		}
		if ts.Crossed > 0 {
			mu := need * bound / float64(ts.Crossed)
			rep.Tracks[i] = &sampling.Interval{P: math.Ldexp(mu, t.log2Ref), Lo: math.Ldexp(mu/(1+e.Epsilon), t.log2Ref), Hi: math.Min(1, math.Ldexp(mu/(1-e.Epsilon), t.log2Ref))}
			rep.Notes = append(rep.Notes, fmt.Sprintf("(ε, δ) rule held for %s after %d samples: %.4g, within [%.4g, %.4g] with probability at least %g (Dagum et al. 2000)",
				name, ts.Crossed, rep.Tracks[i].P, rep.Tracks[i].Lo, rep.Tracks[i].Hi, 1-e.Delta))
			continue
		}
		if rep.ExpectedSamples[i] > perTrack {
			rep.Notes = append(rep.Notes, fmt.Sprintf("(ε, δ) rule: the weights of %s are bounded by %.3g times the current estimate, so the rule needs about %.3g samples, more than the %.0f this run may draw per track",
				name, bound/math.Max(mean, math.SmallestNonzeroFloat64), rep.ExpectedSamples[i], perTrack))
		}
	}
	if rep.Met {
		rep.Notes = append(rep.Notes, fmt.Sprintf("(ε, δ) rule: it covers P(evidence) and the joint probabilities of the rare-state tracks; each ratio P(state | evidence) then lies within [(1−ε)/(1+ε), (1+ε)/(1−ε)] times its estimate with probability at least %g; the other posterior marginals have normal (central limit) intervals", 1-2*e.Delta))
	}
	return rep
}
