package adaptive

import (
	"math"
	"slices"

	"github.com/beliefd/beliefd/service/model"
)

// BP settings (common practice for loopy belief propagation: a few dozen
// sweeps, damping once the first sweeps have not converged).
const (
	bpMaxSweeps   = 200
	bpUndamped    = 1
	bpDamping     = 0.5
	bpTolerance   = 1e-7
	bpTinyMessage = 1e-300
)

// bpResult holds, per variable, the product of the evidence likelihood and
// of every λ message from its children: the evidence "below" the variable
// as loopy belief propagation sees it. The importance function starts from
// P(x | parents) · lambda(x).
type bpResult struct {
	lambda    [][]float64
	sweeps    int
	converged bool
	// contradiction is set when a λ vector came out all zero: the
	// evidence is impossible (zeros found by propagation are sound).
	contradiction bool
}

// slot is one arc parent -> child as seen from the child (parent index j).
type slot struct {
	child, j int
}

// propagate runs Pearl's message passing (π messages down, λ messages up)
// on the network as if it had no loops, for at most maxSweeps sweeps. hard
// and soft are the evidence of one track. It is deterministic. With one
// sweep it is a single upward pass: every λ message computed with the
// co-parents at their prior π, so without explaining away.
func propagate(net *model.Network, hard []int32, soft [][]float64, maxSweeps int) *bpResult {
	n := len(net.Vars)
	card := func(v int) int { return len(net.Vars[v].States) }
	// Messages per arc, indexed by (child, parent position).
	piMsg := make([][][]float64, n)  // π from parent j into child
	lamMsg := make([][][]float64, n) // λ from child to parent j
	childSlots := make([][]slot, n)
	for v := range net.Vars {
		x := &net.Vars[v]
		piMsg[v] = make([][]float64, len(x.Parents))
		lamMsg[v] = make([][]float64, len(x.Parents))
		for j, p := range x.Parents {
			piMsg[v][j] = uniform(card(p))
			lamMsg[v][j] = ones(card(p))
			childSlots[p] = append(childSlots[p], slot{child: v, j: j})
		}
	}
	evLik := make([][]float64, n)
	for v := range net.Vars {
		l := ones(card(v))
		if h := hard[v]; h >= 0 {
			for s := range l {
				if s != int(h) {
					l[s] = 0
				}
			}
		} else if soft != nil && soft[v] != nil {
			copy(l, soft[v])
		}
		evLik[v] = l
	}
	// belowMarked[v]: v has evidence at or below it, so it can send a
	// non-constant λ message. Variables without any send constants, which
	// are skipped.
	below := make([]bool, n)
	for v := n - 1; v >= 0; v-- {
		if hard[v] >= 0 || (soft != nil && soft[v] != nil) {
			below[v] = true
		}
		for _, c := range net.Vars[v].Children {
			if below[c] {
				below[v] = true
			}
		}
	}
	res := &bpResult{lambda: make([][]float64, n)}
	lamIn := make([][]float64, n)
	piV := make([][]float64, n)
	for v := range net.Vars {
		lamIn[v] = make([]float64, card(v))
		piV[v] = make([]float64, card(v))
	}
	maxCard := 1
	maxPar := 0
	for v := range net.Vars {
		maxCard = max(maxCard, card(v))
		maxPar = max(maxPar, len(net.Vars[v].Parents))
	}
	// outs[v][j] accumulates v's λ message to parent j within a sweep.
	outs := make([][][]float64, n)
	for v := range net.Vars {
		if np := len(net.Vars[v].Parents); np > 0 && below[v] {
			outs[v] = make([][]float64, np)
			for j, p := range net.Vars[v].Parents {
				outs[v][j] = make([]float64, card(p))
			}
		}
	}
	// Skipping work whose result is known: a message is a function of the
	// sender's inputs, so when none of them changed (bit for bit) since the
	// sender last computed it, and its last update left it equal to what
	// was computed (settled: damping had nothing left to move), computing
	// it again would change nothing. Stamps count computations: a message
	// changed at the computation numbered clock gets that stamp; downAt and
	// upAt are the numbers of a variable's last down and up computations.
	piStamp, lamStamp := make([][]int, n), make([][]int, n)
	piSettled, lamSettled := make([][]bool, n), make([][]bool, n)
	for v := range net.Vars {
		np := len(net.Vars[v].Parents)
		piStamp[v], lamStamp[v] = make([]int, np), make([]int, np)
		piSettled[v], lamSettled[v] = make([]bool, np), make([]bool, np)
	}
	downAt, upAt := make([]int, n), make([]int, n)
	for v := range downAt {
		downAt[v], upAt[v] = -1, -1
	}
	clock := 0
	// unchangedSince reports whether the messages into v (π from its
	// parents, λ from its children) are as they were at computation at.
	unchangedSince := func(v, at int) bool {
		if at < 0 {
			return false
		}
		for _, st := range piStamp[v] {
			if st > at {
				return false
			}
		}
		for _, sl := range childSlots[v] {
			if lamStamp[sl.child][sl.j] > at {
				return false
			}
		}
		return true
	}
	ctr := make([]int, maxPar)
	pre := make([]float64, maxPar+1)
	suf := make([]float64, maxPar+1)
	msg := make([]float64, maxCard)
	// lambdaIn computes evLik(v) · Π λ messages from children into lamIn[v].
	lambdaIn := func(v int) {
		l := lamIn[v]
		copy(l, evLik[v])
		for _, sl := range childSlots[v] {
			m := lamMsg[sl.child][sl.j]
			for s := range l {
				l[s] *= m[s]
			}
		}
		normalizeMax(l)
	}
	for sweep := 1; sweep <= maxSweeps; sweep++ {
		damp := 0.0
		if sweep > bpUndamped {
			damp = bpDamping
		}
		change := 0.0
		// Down: π of every variable, then its messages to the children.
		for v := range net.Vars {
			kids := childSlots[v]
			if len(kids) == 0 {
				continue // π(v) is only needed for the messages
			}
			if unchangedSince(v, downAt[v]) {
				settled := true
				for _, sl := range kids {
					settled = settled && piSettled[sl.child][sl.j]
				}
				if settled {
					continue
				}
			}
			clock++
			downAt[v] = clock
			x := &net.Vars[v]
			c := card(v)
			pv := piV[v]
			clear(pv)
			rows := x.Rows
			np := len(x.Parents)
			clear(ctr[:np])
			for r := 0; r < rows; r++ {
				w := 1.0
				for j := 0; j < np; j++ {
					w *= piMsg[v][j][ctr[j]]
				}
				if w != 0 {
					row := x.CPT[r*c : (r+1)*c]
					for s := range pv {
						pv[s] += w * row[s]
					}
				}
				next(ctr[:np], x, net)
			}
			normalizeSum(pv)
			// Message to child k: π(v)·evLik(v)·Π_{k'≠k} λ_{k'}.
			for k, sl := range kids {
				m := msg[:c]
				for s := range m {
					m[s] = pv[s] * evLik[v][s]
				}
				for k2, sl2 := range kids {
					if k2 == k || !below[sl2.child] {
						continue // children without evidence below send 1s
					}
					lm := lamMsg[sl2.child][sl2.j]
					for s := range m {
						m[s] *= lm[s]
					}
				}
				if !normalizeSum(m) {
					copy(m, pv)
					normalizeSum(m)
				}
				d, changed, settled := update(piMsg[sl.child][sl.j], m, damp)
				change = math.Max(change, d)
				if changed {
					piStamp[sl.child][sl.j] = clock
				}
				piSettled[sl.child][sl.j] = settled
			}
		}
		// Up: λ messages from every variable with evidence below it.
		for v := n - 1; v >= 0; v-- {
			x := &net.Vars[v]
			np := len(x.Parents)
			if np == 0 || !below[v] {
				continue
			}
			if unchangedSince(v, upAt[v]) && !slices.Contains(lamSettled[v], false) {
				continue
			}
			clock++
			upAt[v] = clock
			lambdaIn(v)
			c := card(v)
			l := lamIn[v]
			out := outs[v] // accumulated messages
			for j := range out {
				clear(out[j])
			}
			clear(ctr[:np])
			for r := 0; r < x.Rows; r++ {
				row := x.CPT[r*c : (r+1)*c]
				s := 0.0
				for k := range row {
					s += row[k] * l[k]
				}
				if s != 0 {
					pre[0] = 1
					for j := 0; j < np; j++ {
						pre[j+1] = pre[j] * piMsg[v][j][ctr[j]]
					}
					suf[np] = 1
					for j := np - 1; j >= 0; j-- {
						suf[j] = suf[j+1] * piMsg[v][j][ctr[j]]
					}
					for j := 0; j < np; j++ {
						out[j][ctr[j]] += s * pre[j] * suf[j+1]
					}
				}
				next(ctr[:np], x, net)
			}
			for j := range x.Parents {
				if !normalizeSum(out[j]) {
					res.contradiction = true
					for k := range out[j] {
						out[j][k] = 1 / float64(len(out[j]))
					}
				}
				d, changed, settled := update(lamMsg[v][j], out[j], damp)
				change = math.Max(change, d)
				if changed {
					lamStamp[v][j] = clock
				}
				lamSettled[v][j] = settled
			}
		}
		res.sweeps = sweep
		if change < bpTolerance {
			res.converged = true
			break
		}
	}
	for v := range net.Vars {
		lambdaIn(v)
		allZero := true
		for _, x := range lamIn[v] {
			if x > 0 {
				allZero = false
			}
		}
		if allZero {
			res.contradiction = true
		}
		res.lambda[v] = append([]float64(nil), lamIn[v]...)
	}
	return res
}

// next advances the parent-state counter ctr of x's rows (last parent fastest).
func next(ctr []int, x *model.Node, net *model.Network) {
	for j := len(ctr) - 1; j >= 0; j-- {
		ctr[j]++
		if ctr[j] < len(net.Vars[x.Parents[j]].States) {
			return
		}
		ctr[j] = 0
	}
}

// update moves old towards new (damped) and returns the largest change,
// whether any entry changed, and whether old now equals nw (settled: an
// update with the same nw would leave it as it is).
func update(old, nw []float64, damp float64) (d float64, changed, settled bool) {
	settled = true
	for s := range old {
		v := (1-damp)*nw[s] + damp*old[s]
		d = math.Max(d, math.Abs(v-old[s]))
		changed = changed || v != old[s]
		settled = settled && v == nw[s]
		old[s] = v
	}
	return d, changed, settled
}

func uniform(n int) []float64 {
	v := make([]float64, n)
	for i := range v {
		v[i] = 1 / float64(n)
	}
	return v
}

func ones(n int) []float64 {
	v := make([]float64, n)
	for i := range v {
		v[i] = 1
	}
	return v
}

// normalizeSum scales v to sum 1; it reports false (leaving v) when the sum is 0.
func normalizeSum(v []float64) bool {
	s := 0.0
	for _, x := range v {
		s += x
	}
	if !(s > 0) || math.IsInf(s, 0) {
		return false
	}
	for i := range v {
		v[i] /= s
		if v[i] < bpTinyMessage {
			v[i] = 0
		}
	}
	return true
}

// normalizeMax scales v to a largest entry of 1 (no change when all are 0).
func normalizeMax(v []float64) {
	m := 0.0
	for _, x := range v {
		m = math.Max(m, x)
	}
	if m > 0 {
		for i := range v {
			v[i] /= m
		}
	}
}
