package sampling

import "math"

// Interval is an estimate with a confidence interval. Exact answers have
// Lo == Hi == P.
type Interval struct {
	P  float64 `json:"p"`
	Lo float64 `json:"lo"`
	Hi float64 `json:"hi"`
}

// HalfWidth is half the width of the interval.
func (iv Interval) HalfWidth() float64 { return (iv.Hi - iv.Lo) / 2 }

// NormalQuantile returns the p-quantile of the standard normal distribution.
func NormalQuantile(p float64) float64 {
	return math.Sqrt2 * math.Erfinv(2*p-1)
}

// TwoSidedZ returns z such that a standard normal lies in [-z, z] with
// probability confidence.
func TwoSidedZ(confidence float64) float64 {
	return NormalQuantile(0.5 + confidence/2)
}

// Wilson returns the Wilson score interval for k successes in n trials at
// the given two-sided confidence (Wilson 1927, JASA 22:209-212). With n = 0
// it returns [0, 1] around an estimate of 0.
func Wilson(k, n, confidence float64) Interval {
	if n <= 0 {
		return Interval{P: 0, Lo: 0, Hi: 1}
	}
	z := TwoSidedZ(confidence)
	p := k / n
	z2 := z * z
	den := 1 + z2/n
	centre := (p + z2/(2*n)) / den
	half := z / den * math.Sqrt(p*(1-p)/n+z2/(4*n*n))
	lo, hi := centre-half, centre+half
	if k <= 0 {
		lo = 0
	}
	if k >= n {
		hi = 1
	}
	return Interval{P: p, Lo: math.Max(0, lo), Hi: math.Min(1, hi)}
}

// NormalInterval is p ± z·se clipped to [lo, hi].
func NormalInterval(p, se, confidence, lo, hi float64) Interval {
	z := TwoSidedZ(confidence)
	return Interval{P: p, Lo: math.Max(lo, p-z*se), Hi: math.Min(hi, p+z*se)}
}
