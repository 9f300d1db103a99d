package exact

import "math"

// odo maps the entries of a table, walked in row-major order, to indices
// of a smaller table (a separator or a conditional probability table).
// Dimensions are listed slowest first; adjacent dimensions that map
// contiguously are merged, so the walk proceeds in long runs over the last
// dimension.
type odo struct {
	size   []int
	stride []int
}

// newOdo builds the map for a table with the given dimension sizes (slowest
// first) in which dimension k moves the target index by strides[k].
func newOdo(sizes, strides []int) odo {
	var m odo
	for k, c := range sizes {
		s := strides[k]
		if c == 1 {
			continue
		}
		if n := len(m.size); n > 0 && m.stride[n-1] == s*c {
			m.size[n-1] *= c
			m.stride[n-1] = s
			continue
		}
		m.size = append(m.size, c)
		m.stride = append(m.stride, s)
	}
	if len(m.size) == 0 {
		m.size, m.stride = []int{1}, []int{0}
	}
	return m
}

// next advances the outer dimensions (all but the last) and returns the
// target offset of the next run.
func (m *odo) next(ctr []int, s int) int {
	for k := len(m.size) - 2; k >= 0; k-- {
		ctr[k]++
		s += m.stride[k]
		if ctr[k] < m.size[k] {
			return s
		}
		ctr[k] = 0
		s -= m.size[k] * m.stride[k]
	}
	return s
}

// sumTo adds every entry of src into dst at its mapped index.
func (m *odo) sumTo(dst, src []float64, ctr []int) {
	last := len(m.size) - 1
	clear(ctr[:last])
	L, sl := m.size[last], m.stride[last]
	s := 0
	for base := 0; base < len(src); base += L {
		run := src[base : base+L]
		switch sl {
		case 0:
			acc := 0.0
			for _, x := range run {
				acc += x
			}
			dst[s] += acc
		case 1:
			d := dst[s : s+L]
			for j, x := range run {
				d[j] += x
			}
		default:
			for j, x := range run {
				dst[s+j*sl] += x
			}
		}
		s = m.next(ctr, s)
	}
}

// maxTo raises dst at each mapped index to the largest entry of src mapped
// there. dst must start at zero.
func (m *odo) maxTo(dst, src []float64, ctr []int) {
	last := len(m.size) - 1
	clear(ctr[:last])
	L, sl := m.size[last], m.stride[last]
	s := 0
	for base := 0; base < len(src); base += L {
		run := src[base : base+L]
		for j, x := range run {
			if x > dst[s+j*sl] {
				dst[s+j*sl] = x
			}
		}
		s = m.next(ctr, s)
	}
}

// mulFrom multiplies every entry of dst by the entry of src it maps to.
func (m *odo) mulFrom(dst, src []float64, ctr []int) {
	last := len(m.size) - 1
	clear(ctr[:last])
	L, sl := m.size[last], m.stride[last]
	s := 0
	for base := 0; base < len(dst); base += L {
		run := dst[base : base+L]
		switch sl {
		case 0:
			f := src[s]
			if f == 0 {
				clear(run)
			} else if f != 1 {
				for j := range run {
					run[j] *= f
				}
			}
		case 1:
			f := src[s : s+L]
			for j := range run {
				run[j] *= f[j]
			}
		default:
			for j := range run {
				run[j] *= src[s+j*sl]
			}
		}
		s = m.next(ctr, s)
	}
}

// fill writes the mapped index of every entry of a table of n entries.
func (m *odo) fill(idx []int32) {
	last := len(m.size) - 1
	ctr := make([]int, len(m.size))
	L, sl := m.size[last], m.stride[last]
	s := 0
	for base := 0; base < len(idx); base += L {
		for j := range L {
			idx[base+j] = int32(s + j*sl)
		}
		s = m.next(ctr, s)
	}
}

// sepMap maps a parent's table onto a child's separator: through an
// explicit index per entry when memory allows, else by walking the odo.
type sepMap struct {
	o   odo
	idx []int32
}

func (m *sepMap) sumTo(dst, src []float64, ctr []int) {
	if m.idx == nil {
		m.o.sumTo(dst, src, ctr)
		return
	}
	idx := m.idx[:len(src)]
	for i, x := range src {
		dst[idx[i]] += x
	}
}

// mulFrom multiplies dst by the separator table src and returns the
// largest entry of the result.
func (m *sepMap) mulFrom(dst, src []float64, ctr []int) float64 {
	if m.idx == nil {
		m.o.mulFrom(dst, src, ctr)
		return maxOf(dst)
	}
	idx := m.idx[:len(dst)]
	mx := 0.0
	for i := range dst {
		x := dst[i] * src[idx[i]]
		dst[i] = x
		if x > mx {
			mx = x
		}
	}
	return mx
}

// blockSums sums consecutive blocks of src of length len(src)/len(dst)
// into dst (overwriting it).
func blockSums(dst, src []float64) {
	rest := len(src) / len(dst)
	for s := range dst {
		acc := 0.0
		for _, x := range src[s*rest : (s+1)*rest] {
			acc += x
		}
		dst[s] = acc
	}
}

// blockMax writes the maximum of each consecutive block of src into dst.
func blockMax(dst, src []float64) {
	rest := len(src) / len(dst)
	for s := range dst {
		m := 0.0
		for _, x := range src[s*rest : (s+1)*rest] {
			if x > m {
				m = x
			}
		}
		dst[s] = m
	}
}

// blockMulRatio multiplies block s of dst (blocks of len(dst)/len(num)
// consecutive entries) by num[s]/den[s], 0 where either is 0. When the
// ratio itself overflows, each entry is divided before it is multiplied:
// an entry of block s is at most den[s] times the table's sum, so the
// quotient stays finite.
func blockMulRatio(dst, num, den []float64) {
	rest := len(dst) / len(num)
	for s, x := range num {
		run := dst[s*rest : (s+1)*rest]
		d := den[s]
		if x == 0 || d == 0 {
			clear(run)
			continue
		}
		r := x / d
		if r == 1 {
			continue
		}
		if r <= math.MaxFloat64 {
			for j := range run {
				run[j] *= r
			}
			continue
		}
		for j := range run {
			run[j] = run[j] / d * x
		}
	}
}

// rescale divides every entry by m.
func rescale(pot []float64, m float64) {
	inv := 1 / m
	if inv <= math.MaxFloat64 {
		for i := range pot {
			pot[i] *= inv
		}
		return
	}
	for i := range pot {
		pot[i] /= m
	}
}

// maxOf returns the largest entry (0 for none).
func maxOf(xs []float64) float64 {
	m := 0.0
	for _, x := range xs {
		if x > m {
			m = x
		}
	}
	return m
}

// axis locates one variable in a clique table laid out as outer x card x inner.
type axis struct {
	clique             int
	outer, card, inner int
}

// scale multiplies the table along the axis by lik.
func (a axis) scale(pot, lik []float64) {
	for o := 0; o < a.outer; o++ {
		for s, l := range lik {
			run := pot[(o*a.card+s)*a.inner : (o*a.card+s+1)*a.inner]
			if l == 0 {
				clear(run)
				continue
			}
			if l == 1 {
				continue
			}
			for j := range run {
				run[j] *= l
			}
		}
	}
}

// keep zeroes every entry whose state on the axis is not state.
func (a axis) keep(pot []float64, state int) {
	for o := 0; o < a.outer; o++ {
		for s := 0; s < a.card; s++ {
			if s != state {
				clear(pot[(o*a.card+s)*a.inner : (o*a.card+s+1)*a.inner])
			}
		}
	}
}

// sum writes the marginal (unnormalised) of the axis variable into out.
func (a axis) sum(pot, out []float64) {
	clear(out)
	for o := 0; o < a.outer; o++ {
		for s := 0; s < a.card; s++ {
			acc := 0.0
			for _, x := range pot[(o*a.card+s)*a.inner : (o*a.card+s+1)*a.inner] {
				acc += x
			}
			out[s] += acc
		}
	}
}

// smallestNormal is the least positive normal float64.
const smallestNormal = 0x1p-1022

// logOf is the natural log, exact also for subnormal arguments (math.Log
// on amd64 returns about -709.09 for every subnormal input, as measured
// with Go 1.26).
func logOf(x float64) float64 {
	if x > 0 && x < smallestNormal {
		f, e := math.Frexp(x)
		return math.Log(f) + float64(e)*math.Ln2
	}
	return math.Log(x)
}
