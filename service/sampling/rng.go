package sampling

import "math/bits"

// Rand is a xoshiro256+ generator (Blackman & Vigna 2018): fast, with good
// quality in the high bits, which are the ones Float64 uses.
type Rand struct{ s0, s1, s2, s3 uint64 }

func splitmix64(x *uint64) uint64 {
	*x += 0x9e3779b97f4a7c15
	z := *x
	z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9
	z = (z ^ (z >> 27)) * 0x94d049bb133111eb
	return z ^ (z >> 31)
}

// NewStream returns the random stream of block `block` of a run with seed
// `seed`. The stream depends on (seed, block) only, which is what makes
// results independent of how blocks are spread over goroutines, processes
// or machines.
func NewStream(seed, block uint64) Rand {
	// Mix the block index through one splitmix round before combining it
	// with the seed, so neighbouring (seed, block) pairs do not collide.
	b := block
	x := seed ^ splitmix64(&b)
	var r Rand
	r.s0 = splitmix64(&x)
	r.s1 = splitmix64(&x)
	r.s2 = splitmix64(&x)
	r.s3 = splitmix64(&x)
	if r.s0|r.s1|r.s2|r.s3 == 0 {
		r.s0 = 1
	}
	return r
}

// Uint64 returns the next 64 random bits.
func (r *Rand) Uint64() uint64 {
	res := r.s0 + r.s3
	t := r.s1 << 17
	r.s2 ^= r.s0
	r.s3 ^= r.s1
	r.s1 ^= r.s2
	r.s0 ^= r.s3
	r.s2 ^= t
	r.s3 = bits.RotateLeft64(r.s3, 45)
	return res
}

// Float64 returns a uniform number in [0, 1) with 53 random bits.
func (r *Rand) Float64() float64 {
	return float64(r.Uint64()>>11) * 0x1.0p-53
}

// IntN returns a uniform integer in [0, n) for n > 0 (Lemire's method,
// without the rejection step: the bias is below n/2^64).
func (r *Rand) IntN(n int) int {
	hi, _ := bits.Mul64(r.Uint64(), uint64(n))
	return int(hi)
}
