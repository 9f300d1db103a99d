package jobs

import (
	"math"
	"sync"
	"testing"
	"time"
)

func shareTable(m map[string]float64) func(string) float64 {
	return func(t string) float64 { return TenantPolicy{Share: m[t]}.EffectiveShare() }
}

// Under concurrent picks the accounts balance: whatever was charged at
// pick time, a tenant's pass ends as the worker time of its units divided
// by its share (refunded picks count nothing), and the two tenants' passes
// stay within one stride per goroutine of each other: every pick takes the
// smallest pass, and only picks in flight can hold a charge that is not
// yet corrected.
func TestFairQueueConcurrentAccounts(t *testing.T) {
	shares := map[string]float64{"atlas": 1, "birch": 2}
	q := newFairQueue(shareTable(shares))
	cands := []Claimable{{ID: "a", Tenant: "atlas"}, {ID: "b", Tenant: "birch"}}
	unit := map[string]time.Duration{"atlas": 2 * time.Millisecond, "birch": 3 * time.Millisecond}
	const workers, each = 8, 500
	var (
		mu     sync.Mutex
		worked = map[string]int{}
		wg     sync.WaitGroup
	)
	for w := range workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for i := range each {
				groups := q.round(cands)
				tried := make([]bool, len(groups))
				g, tk := q.pick(groups, tried)
				// Every seventh pick finds nothing to claim.
				ok := (w+i)%7 != 0
				q.done(tk, ok, unit[groups[g].tenant])
				if ok {
					mu.Lock()
					worked[groups[g].tenant]++
					mu.Unlock()
				}
			}
		}()
	}
	wg.Wait()
	stride := 0.0
	for name, d := range unit {
		want := float64(worked[name]) * d.Seconds() / shares[name]
		if got := q.ts[name].pass; math.Abs(got-want) > 1e-9*want {
			t.Errorf("pass of %s = %.9f; want %d units x %v / share %g = %.9f", name, got, worked[name], d, shares[name], want)
		}
		stride = max(stride, d.Seconds()/shares[name])
	}
	if gap := math.Abs(q.ts["atlas"].pass - q.ts["birch"].pass); gap > (workers+1)*stride {
		t.Errorf("passes differ by %.6fs; the policy keeps them within %d strides (%.6fs)", gap, workers+1, (workers+1)*stride)
	}
	t.Logf("units: atlas %d, birch %d (shares 1:2, unit times 2ms:3ms: worker time %.3fs : %.3fs)",
		worked["atlas"], worked["birch"], float64(worked["atlas"])*0.002, float64(worked["birch"])*0.003)
}

// A tenant that comes back after being idle starts at the others' pass:
// no credit for the idle time. A tenant that was served ahead of one that
// could not use its turns keeps that lead while it is idle for a moment.
func TestFairQueueReentry(t *testing.T) {
	q := newFairQueue(shareTable(nil))
	serve := func(cands []Claimable, d time.Duration) string {
		groups := q.round(cands)
		g, tk := q.pick(groups, make([]bool, len(groups)))
		q.done(tk, true, d)
		return groups[g].tenant
	}
	a := []Claimable{{ID: "1", Tenant: "atlas"}}
	ab := []Claimable{{ID: "1", Tenant: "atlas"}, {ID: "2", Tenant: "birch"}}
	for range 50 {
		serve(a, time.Second)
	}
	// birch arrives after atlas had 50s alone: they alternate from here.
	var got []string
	for range 6 {
		got = append(got, serve(ab, time.Second))
	}
	if want := "[atlas birch atlas birch atlas birch]"; stringsOf(got) != want {
		t.Fatalf("after birch arrives: %v; want %s", got, want)
	}
	// atlas has work listed but none to claim for 10 turns (its picks are
	// refunded), so birch runs ahead; birch is idle for a moment, then
	// back: it keeps its lead, and atlas has the next 10 turns.
	for range 10 {
		groups := q.round(ab)
		tried := make([]bool, len(groups))
		for {
			g, tk := q.pick(groups, tried)
			tried[g] = true
			if groups[g].tenant == "atlas" {
				q.done(tk, false, 0)
				continue
			}
			q.done(tk, true, time.Second)
			break
		}
	}
	serve(a, time.Second) // birch idle for a moment
	got = got[:0]
	for range 11 {
		got = append(got, serve(ab, time.Second))
	}
	if want := "[atlas atlas atlas atlas atlas atlas atlas atlas atlas atlas birch]"; stringsOf(got) != want {
		t.Fatalf("after birch ran ahead: %v; want %s", got, want)
	}
	// A tenant idle until the others have caught up is forgotten, and
	// re-enters at their pass.
	for range 30 {
		serve(a, time.Second)
	}
	if _, ok := q.ts["birch"]; ok {
		t.Fatalf("birch is still tracked after atlas caught up and passed it")
	}
	if got := serve(ab, time.Second); got != "atlas" {
		t.Fatalf("birch back after idling got the turn before atlas (tie: name order): %s", got)
	}
	if got := serve(ab, time.Second); got != "birch" {
		t.Fatalf("second turn after birch is back: %s; want birch", got)
	}
}

func stringsOf(s []string) string {
	out := "["
	for i, x := range s {
		if i > 0 {
			out += " "
		}
		out += x
	}
	return out + "]"
}
