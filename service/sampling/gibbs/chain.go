package gibbs

import (
	"fmt"
	"math"
	"sync/atomic"

	"github.com/beliefd/beliefd/service/sampling"
)

// maxStartAttempts bounds the forward draws tried for a starting state.
const maxStartAttempts = 1000

// series is the stored (thinned) draws of one target in one chain: state
// indices as bytes when the target has at most 256 states, else as uint16.
type series struct {
	u8  []uint8
	u16 []uint16
}

func newSeries(card int, capacity int) series {
	if card <= 256 {
		return series{u8: make([]uint8, 0, capacity)}
	}
	return series{u16: make([]uint16, 0, capacity)}
}

func (s *series) len() int {
	if s.u16 != nil {
		return len(s.u16)
	}
	return len(s.u8)
}

func (s *series) at(i int) int {
	if s.u16 != nil {
		return int(s.u16[i])
	}
	return int(s.u8[i])
}

func (s *series) push(v int32) {
	if s.u16 != nil {
		s.u16 = append(s.u16, uint16(v))
	} else {
		s.u8 = append(s.u8, uint8(v))
	}
}

func (s *series) truncate(n int) {
	if s.u16 != nil {
		s.u16 = s.u16[:n]
	} else {
		s.u8 = s.u8[:n]
	}
}

// halve keeps the draws at even positions.
func (s *series) halve() {
	if s.u16 != nil {
		for i := 0; 2*i < len(s.u16); i++ {
			s.u16[i] = s.u16[2*i]
		}
		s.u16 = s.u16[:(len(s.u16)+1)/2]
		return
	}
	for i := 0; 2*i < len(s.u8); i++ {
		s.u8[i] = s.u8[2*i]
	}
	s.u8 = s.u8[:(len(s.u8)+1)/2]
}

// chain is one Gibbs chain with its statistics. Statistics of a segment in
// progress are pending until commit, so that an interrupted segment can be
// dropped and the chain's statistics stay at a round boundary.
type chain struct {
	p   *plan
	rng sampling.Rand
	x   []int32 // current state of every variable (relevant ones only)
	row []int32 // current table row of every relevant variable
	buf []float64
	lbf []float64

	sweeps int64 // committed sweeps, burn-in included
	kept   int64 // committed kept sweeps
	stride int64 // stored draws are the kept sweeps k with k % stride == 0
	counts []int64
	// pending statistics of the running segment
	pendSweeps int64
	pendKept   int64
	delta      []int64
	store      []series // per target; zero value for observed targets
	storeLen   int      // committed stored length
	storeCap   int
}

func newChain(p *plan, storeCap, initCap int) *chain {
	n := len(p.net.Vars)
	c := &chain{
		p: p, x: make([]int32, n), row: make([]int32, n),
		buf: make([]float64, p.maxCard), lbf: make([]float64, p.maxCard),
		stride: 1, counts: make([]int64, p.nState), delta: make([]int64, p.nState),
		store: make([]series, len(p.targets)), storeCap: storeCap,
	}
	for i, t := range p.targets {
		if p.hard[t] < 0 {
			c.store[i] = newSeries(int(p.card[t]), initCap)
		}
	}
	return c
}

// start draws the starting state: a likelihood-weighted forward draw
// (observed variables clamped, soft-evidence variables drawn from their
// table row times the likelihood) with positive weight.
func (c *chain) start() error {
	for attempt := 0; attempt < maxStartAttempts; attempt++ {
		if c.forward() {
			return nil
		}
	}
	return fmt.Errorf("gibbs: %w: %d forward draws found no state with positive probability given the evidence; the evidence may be impossible (check it with exact inference)",
		ErrImpossibleEvidence, maxStartAttempts)
}

func (c *chain) forward() bool {
	p := c.p
	for _, v32 := range p.order {
		v := int(v32)
		r := 0
		for j := p.parStart[v]; j < p.parStart[v+1]; j++ {
			r += int(c.x[p.parVar[j]]) * int(p.parStride[j])
		}
		c.row[v] = int32(r)
		card := int(p.card[v])
		tab := p.cpt[p.cptOff[v]+r*card : p.cptOff[v]+(r+1)*card]
		if h := p.hard[v]; h >= 0 {
			if !(tab[h] > 0) {
				return false
			}
			c.x[v] = h
			continue
		}
		w := c.buf[:card]
		copy(w, tab)
		if lik := p.soft[v]; lik != nil {
			for k := range w {
				w[k] *= lik[k]
			}
		}
		k, ok := draw(&c.rng, w)
		if !ok {
			return false
		}
		c.x[v] = int32(k)
	}
	return true
}

// draw picks an index with probability proportional to w; ok is false when
// the weights do not have a positive finite sum.
func draw(rng *sampling.Rand, w []float64) (int, bool) {
	sum := 0.0
	for _, v := range w {
		sum += v
	}
	if !(sum > 0) || math.IsInf(sum, 0) {
		return 0, false
	}
	u := rng.Float64() * sum
	k, acc := 0, w[0]
	for acc <= u && k < len(w)-1 {
		k++
		acc += w[k]
	}
	for w[k] <= 0 && k > 0 { // u rounded up to the sum: take the last positive weight
		k--
	}
	return k, true
}

// sweep updates every free variable once, in topological order, from its
// full conditional P(X | pa(X)) · Π_children P(child | pa(child)) · soft(X).
func (c *chain) sweep() {
	p := c.p
	x, row, cpt, links := c.x, c.row, p.cpt, p.links
	for i := range p.scan {
		sv := &p.scan[i]
		v := int(sv.v)
		card := int(sv.card)
		xv := int(x[v])
		lk := links[sv.ls:sv.le]
		var k int
		if card == 2 {
			off := sv.off + 2*int(row[v])
			w0, w1 := cpt[off], cpt[off+1]
			for j := range lk {
				l := &lk[j]
				base := l.off + (int(row[l.c])-xv*int(l.stride))*int(l.card) + int(x[l.c])
				w0 *= cpt[base]
				w1 *= cpt[base+l.step]
			}
			if sv.soft != nil {
				w0 *= sv.soft[0]
				w1 *= sv.soft[1]
			}
			sum := w0 + w1
			switch {
			case sum > 0 && sum <= math.MaxFloat64:
				if c.rng.Float64()*sum >= w0 && w1 > 0 {
					k = 1
				}
			default:
				k = c.drawLog(v)
			}
		} else {
			w := c.buf[:card]
			off := sv.off + int(row[v])*card
			copy(w, cpt[off:off+card])
			for j := range lk {
				l := &lk[j]
				base := l.off + (int(row[l.c])-xv*int(l.stride))*int(l.card) + int(x[l.c])
				for s := range w {
					w[s] *= cpt[base+s*l.step]
				}
			}
			if sv.soft != nil {
				for s := range w {
					w[s] *= sv.soft[s]
				}
			}
			var ok bool
			if k, ok = draw(&c.rng, w); !ok {
				k = c.drawLog(v)
			}
		}
		if k != xv {
			x[v] = int32(k)
			d := int32(k - xv)
			for j := range lk {
				row[lk[j].c] += d * lk[j].stride
			}
		}
	}
}

// drawLog redoes the conditional of v in log space, for the rare case where
// the product of many small factors underflows.
func (c *chain) drawLog(v int) int {
	p := c.p
	card := int(p.card[v])
	lw := c.lbf[:card]
	off := p.cptOff[v] + int(c.row[v])*card
	for k := range lw {
		lw[k] = math.Log(p.cpt[off+k])
	}
	xv := int(c.x[v])
	for j := p.chStart[v]; j < p.chStart[v+1]; j++ {
		ch := int(p.chVar[j])
		s := int(p.chStride[j])
		cc := int(p.card[ch])
		base := p.cptOff[ch] + (int(c.row[ch])-xv*s)*cc + int(c.x[ch])
		for k := range lw {
			lw[k] += math.Log(p.cpt[base+k*s*cc])
		}
	}
	if lik := p.soft[v]; lik != nil {
		for k := range lw {
			lw[k] += math.Log(lik[k])
		}
	}
	top := math.Inf(-1)
	for _, l := range lw {
		top = math.Max(top, l)
	}
	w := c.buf[:card]
	for k, l := range lw {
		w[k] = math.Exp(l - top)
	}
	k, ok := draw(&c.rng, w)
	if !ok {
		return xv // cannot happen once checkSupport passed; stay put
	}
	return k
}

// runSegment runs sweeps [from, to) of the chain; sweeps at or after burnIn
// are kept. It returns false when abort was raised before the end.
func (c *chain) runSegment(from, to, burnIn int64, abort *atomic.Bool) bool {
	p := c.p
	for s := from; s < to; s++ {
		if abort.Load() {
			return false
		}
		c.sweep()
		c.pendSweeps++
		if s < burnIn {
			continue
		}
		k := c.kept + c.pendKept
		c.pendKept++
		storeIt := k%c.stride == 0
		for i, t := range p.targets {
			if p.hard[t] >= 0 {
				continue
			}
			st := c.x[t]
			c.delta[p.tOff[i]+int(st)]++
			if storeIt {
				c.store[i].push(st)
			}
		}
	}
	return true
}

// commit adds the segment's statistics to the chain's and thins the stored
// draws when they exceed the cap.
func (c *chain) commit() {
	for i, d := range c.delta {
		c.counts[i] += d
		c.delta[i] = 0
	}
	c.sweeps += c.pendSweeps
	c.kept += c.pendKept
	c.pendSweeps, c.pendKept = 0, 0
	l := 0
	for i := range c.store {
		if c.p.hard[c.p.targets[i]] < 0 {
			l = c.store[i].len()
		}
	}
	for l > c.storeCap {
		for i := range c.store {
			if c.p.hard[c.p.targets[i]] < 0 {
				c.store[i].halve()
			}
		}
		l = (l + 1) / 2
		c.stride *= 2
	}
	c.storeLen = l
}

// rollback drops the statistics of an interrupted segment.
func (c *chain) rollback() {
	for i := range c.delta {
		c.delta[i] = 0
	}
	c.pendSweeps, c.pendKept = 0, 0
	for i := range c.store {
		if c.p.hard[c.p.targets[i]] < 0 {
			c.store[i].truncate(c.storeLen)
		}
	}
}
