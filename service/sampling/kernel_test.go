package sampling

import (
	"math"
	"math/rand/v2"
	"testing"

	"github.com/beliefd/beliefd/service/model"
)

// Inversion sampling (common practice): state s is drawn when
// cum[s-1] <= u < cum[s]. pick must agree with that rule, and a state of
// probability 0 is never drawn, even when rounding leaves the last
// cumulative sum below 1 and u is the largest Float64 below 1.
func TestPickIsInversion(t *testing.T) {
	rng := rand.New(rand.NewPCG(1, 1))
	largest := math.Nextafter(1, 0)
	for trial := 0; trial < 2000; trial++ {
		card := 2 + rng.IntN(9)
		row := make([]float64, card)
		sum := 0.0
		for s := range row {
			if rng.IntN(3) > 0 || s == card-1 && sum == 0 {
				row[s] = rng.Float64()
				sum += row[s]
			}
		}
		for s := range row {
			row[s] /= sum
		}
		doc := &model.Document{Variables: []model.Variable{{Name: "x", States: states(card), Table: [][]float64{row}}}}
		net, err := model.Compile(doc, model.Limits{})
		if err != nil {
			t.Fatal(err)
		}
		k, err := NewKernel(net, nil, MethodForward, nil)
		if err != nil {
			t.Fatal(err)
		}
		row = net.Vars[0].CPT
		us := []float64{0, largest, rng.Float64()}
		c := 0.0
		for _, p := range row {
			c += p
			us = append(us, c, math.Nextafter(c, 0))
		}
		for _, u := range us {
			if u >= 1 {
				continue
			}
			got := pick(k.cum[:card], u)
			if row[got] == 0 {
				t.Fatalf("row %v, u = %v: picked state %d of probability 0", row, u, got)
			}
			want, c := -1, 0.0
			for s, p := range row {
				c += p
				if u < c {
					want = s
					break
				}
			}
			if want >= 0 && int(got) != want {
				t.Fatalf("row %v, u = %v: picked %d, inversion gives %d", row, u, got, want)
			}
		}
	}
}

func states(n int) []string {
	out := make([]string, n)
	for i := range out {
		out[i] = string(rune('a' + i))
	}
	return out
}

// Block lengths tile the run exactly.
func TestBlockLen(t *testing.T) {
	for _, c := range []struct {
		max int64
		bs  int
	}{{1, 8192}, {8192, 8192}, {8193, 8192}, {20*512 + 77, 512}, {1 << 40, 1 << 22}} {
		nb := NumBlocks(c.max, c.bs)
		var total int64
		for b := int64(0); b < nb; b++ {
			n := BlockLen(b, c.bs, c.max)
			if n <= 0 || n > c.bs || (b < nb-1 && n != c.bs) {
				t.Fatalf("max %d, block size %d: block %d has %d samples", c.max, c.bs, b, n)
			}
			total += int64(n)
		}
		if total != c.max || BlockLen(nb, c.bs, c.max) != 0 || BlockLen(-1, c.bs, c.max) != 0 {
			t.Errorf("max %d, block size %d: %d blocks hold %d samples", c.max, c.bs, nb, total)
		}
	}
}
