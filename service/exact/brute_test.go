package exact_test

import (
	"errors"
	"fmt"
	"math"
	"math/rand/v2"
	"testing"

	"github.com/beliefd/beliefd/service/exact"
	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/model"
)

// bruteForce enumerates the full joint distribution of a small network and
// returns, under the evidence, P(evidence), the posterior marginals, and
// the largest value of the joint times the soft likelihoods. It shares no
// code with the engine: it is the definition of the quantities.
type bruteForce struct {
	pe        float64
	marginals [][]float64
	maxJoint  float64
}

// jointWithEvidence is P(asg) * prod soft likelihoods, or 0 when asg
// contradicts hard evidence.
func jointWithEvidence(net *model.Network, ev *model.Evidence, asg []int) float64 {
	p := 1.0
	for v := range net.Vars {
		n := &net.Vars[v]
		if ev != nil && ev.Hard != nil && ev.Hard[v] >= 0 && ev.Hard[v] != asg[v] {
			return 0
		}
		row := 0
		for j, q := range n.Parents {
			row += asg[q] * n.Strides[j]
		}
		p *= n.CPT[row*n.Card()+asg[v]]
		if ev != nil && ev.Soft != nil && ev.Soft[v] != nil {
			p *= ev.Soft[v][asg[v]]
		}
	}
	return p
}

func enumerate(net *model.Network, ev *model.Evidence) bruteForce {
	n := len(net.Vars)
	bf := bruteForce{marginals: make([][]float64, n)}
	for v := range bf.marginals {
		bf.marginals[v] = make([]float64, net.Vars[v].Card())
	}
	asg := make([]int, n)
	for {
		p := jointWithEvidence(net, ev, asg)
		bf.pe += p
		bf.maxJoint = max(bf.maxJoint, p)
		for v, s := range asg {
			bf.marginals[v][s] += p
		}
		// Next assignment, last variable fastest.
		k := n - 1
		for ; k >= 0; k-- {
			asg[k]++
			if asg[k] < net.Vars[k].Card() {
				break
			}
			asg[k] = 0
		}
		if k < 0 {
			break
		}
	}
	if bf.pe > 0 {
		for v := range bf.marginals {
			for s := range bf.marginals[v] {
				bf.marginals[v][s] /= bf.pe
			}
		}
	}
	return bf
}

// randomEvidence observes each variable with probability 1/4 (hard) or
// 1/6 (soft; a likelihood entry is zero with probability 1/5, never all).
func randomEvidence(rng *rand.Rand, net *model.Network) *model.Evidence {
	ev := net.NoEvidence()
	for v := range net.Vars {
		card := net.Vars[v].Card()
		switch r := rng.Float64(); {
		case r < 0.25:
			ev.Hard[v] = rng.IntN(card)
		case r < 0.25+1.0/6:
			lik := make([]float64, card)
			lik[rng.IntN(card)] = 0.05 + rng.Float64()
			for k := range lik {
				if lik[k] == 0 && rng.Float64() >= 0.2 {
					lik[k] = rng.Float64() * 3
				}
			}
			ev.Soft[v] = lik
		}
	}
	return ev
}

func allVars(net *model.Network) []int {
	t := make([]int, len(net.Vars))
	for i := range t {
		t[i] = i
	}
	return t
}

// TestAgainstEnumeration compares marginals, log P(e) and the MPE value
// with brute-force enumeration of the joint on random networks of up to 10
// variables, with and without exact zeros in the tables.
func TestAgainstEnumeration(t *testing.T) {
	const tol = 1e-9
	zeroCases, cases := 0, 0
	for seed := uint64(1); seed <= 240; seed++ {
		rng := rand.New(rand.NewPCG(seed, 7))
		opt := testnets.RandomOptions{
			Vars:       1 + int(seed%10),
			MaxParents: int(seed % 5),
			MaxStates:  2 + int(seed%2),
		}
		if seed%3 == 0 {
			opt.ZeroProb = 0.3
		}
		if seed%7 == 0 {
			opt.MaxStates = 4
			opt.Vars = min(opt.Vars, 7)
		}
		if seed%5 == 0 {
			opt.Window = 2
		}
		net := testnets.MustCompile(testnets.Random(rng, opt))
		eng, err := exact.Compile(net, exact.Options{})
		if err != nil {
			t.Fatalf("seed %d: compile: %v", seed, err)
		}
		for trial := 0; trial < 4; trial++ {
			ev := net.NoEvidence()
			if trial > 0 {
				ev = randomEvidence(rng, net)
			}
			name := fmt.Sprintf("seed %d trial %d", seed, trial)
			bf := enumerate(net, ev)
			cases++
			post, err := eng.Posterior(ev, allVars(net))
			mpe, merr := eng.MPE(ev)
			if bf.pe == 0 {
				zeroCases++
				if !errors.Is(err, exact.ErrZeroEvidence) || !errors.Is(merr, exact.ErrZeroEvidence) {
					t.Errorf("%s: P(e) = 0 by enumeration, got errors %v / %v", name, err, merr)
				}
				continue
			}
			if err != nil || merr != nil {
				t.Fatalf("%s: unexpected errors %v / %v (P(e) = %g)", name, err, merr, bf.pe)
			}
			wantLog := math.Log(bf.pe)
			if ev.Empty() {
				wantLog = 0
			}
			if math.Abs(post.LogEvidence-wantLog) > tol {
				t.Errorf("%s: log P(e) = %.15g, enumeration %.15g", name, post.LogEvidence, wantLog)
			}
			for v := range net.Vars {
				for s, want := range bf.marginals[v] {
					if got := post.Marginals[v][s]; math.Abs(got-want) > tol || math.IsNaN(got) {
						t.Errorf("%s: P(v%d=%d|e) = %.15g, enumeration %.15g", name, v, s, got, want)
					}
				}
			}
			// MPE: the value must be the brute-force maximum; the
			// assignment itself may differ among ties.
			for v, h := range ev.Hard {
				if h >= 0 && mpe.Assignment[v] != h {
					t.Errorf("%s: MPE sets observed v%d to %d, evidence says %d", name, v, mpe.Assignment[v], h)
				}
			}
			got := jointWithEvidence(net, ev, mpe.Assignment)
			if math.Abs(got-bf.maxJoint) > tol*bf.maxJoint {
				t.Errorf("%s: MPE assignment has probability %.15g, enumeration maximum %.15g", name, got, bf.maxJoint)
			}
			if math.Abs(mpe.LogProb-math.Log(bf.maxJoint)) > tol {
				t.Errorf("%s: MPE LogProb %.15g, log of enumeration maximum %.15g", name, mpe.LogProb, math.Log(bf.maxJoint))
			}
		}
	}
	// The zero-evidence branch must actually be exercised.
	if zeroCases == 0 || zeroCases == cases {
		t.Fatalf("%d of %d cases had zero-probability evidence; the property test needs both kinds", zeroCases, cases)
	}
}
