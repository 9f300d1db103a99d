package gen

import (
	"strings"
	"testing"
)

// SplitMix64 seeded with 0: the first outputs of the reference C code
// (splitmix64.c by Vigna, the 64-bit finaliser in common use; values from
// memory).
func TestSplitMix64Reference(t *testing.T) {
	r := &splitmix64{}
	for i, want := range []uint64{0xe220a8397b1dcdaf, 0x6e789e6aa1b965f4, 0x06c45d188009454f} {
		if got := r.next(); got != want {
			t.Errorf("output %d = %#016x, want %#016x", i, got, want)
		}
	}
}

func TestChooseDistinct(t *testing.T) {
	r := &splitmix64{s: 42}
	for n := 1; n <= 12; n++ {
		for k := 0; k <= n; k++ {
			seen := map[int]bool{}
			for _, x := range r.choose(n, k) {
				if x < 0 || x >= n || seen[x] {
					t.Fatalf("choose(%d, %d) gave %d twice or out of range", n, k, x)
				}
				seen[x] = true
			}
			if len(seen) != k {
				t.Fatalf("choose(%d, %d) gave %d numbers", n, k, len(seen))
			}
		}
	}
}

func TestDistRejectsBadParts(t *testing.T) {
	if _, err := dist(600_000, 300_000); err == nil || !strings.Contains(err.Error(), "900000 ppm") {
		t.Errorf("sum below a million: %v", err)
	}
	if _, err := dist(-1, million+1); err == nil || !strings.Contains(err.Error(), "outside") {
		t.Errorf("negative part: %v", err)
	}
	d, err := dist(999_000, 800, 200)
	if err != nil || d[0] != 0.999 || d[1] != 0.0008 || d[2] != 0.0002 {
		t.Errorf("dist(999000, 800, 200) = %v, %v", d, err)
	}
}

func TestBuilderReportsMistakes(t *testing.T) {
	b := newBuilder()
	b.root("a", "", okFailed, 10)
	b.gate("b", "", okFailed, "any_of", 0, "a", "missing")
	b.root("a", "", okFailed, 10)
	if b.err == nil || !strings.Contains(b.err.Error(), `parent "missing"`) {
		t.Errorf("unknown parent: %v", b.err)
	}
	b = newBuilder()
	b.root("a", "", okFailed, 10)
	b.root("a", "", okFailed, 10)
	if b.err == nil || !strings.Contains(b.err.Error(), `"a" generated twice`) {
		t.Errorf("duplicate: %v", b.err)
	}
	b = newBuilder()
	b.root("a", "", threeLevel[:2], 10)
	b.alarm3("x", "", "a", 1, 2, 3)
	if b.err == nil || !strings.Contains(b.err.Error(), "want 3") {
		t.Errorf("alarm3 on a two-state parent: %v", b.err)
	}
}
