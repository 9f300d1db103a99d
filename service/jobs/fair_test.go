package jobs_test

import (
	"context"
	"encoding/json"
	"fmt"
	"math"
	"sync"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/jobstest"
	"github.com/beliefd/beliefd/service/sampling"
)

// fairRun is one measurement of the small job's latency.
type fairRun struct {
	smallUnits int           // units of the small job until it finished
	bigUnits   int           // units of the big job meanwhile
	latency    time.Duration // on the test clock, from submission to finish
}

// measureFairness runs one worker sequentially (RunOnce in a loop) on a
// memory store whose clock stands still except that every unit advances
// it by its tenant's unit time, so that the schedule is deterministic.
// With big, tenant "atlas" first submits a job far larger than the test
// runs and gets `warm` units alone; then tenant "birch" submits a job of
// smallBlocks blocks, and the loop runs until that job finishes.
func measureFairness(t *testing.T, shares map[string]float64, unit map[string]time.Duration, big bool, warm, smallBlocks int) fairRun {
	t.Helper()
	clock := jobstest.NewClock(time.Date(2031, 3, 4, 5, 6, 7, 0, time.UTC))
	cfg := jobs.Config{TenantPolicy: func(tenant string) jobs.TenantPolicy {
		return jobs.TenantPolicy{Share: shares[tenant]}
	}}
	e := newEnv(t, cfg, clock)
	var (
		mu    sync.Mutex
		units = map[string]int{}
	)
	jobs.SetHookUnit(e.svc, func(j *jobs.Job, _ int64) {
		clock.Advance(unit[j.Tenant])
		mu.Lock()
		units[j.Tenant]++
		mu.Unlock()
	})
	count := func(tenant string) int {
		mu.Lock()
		defer mu.Unlock()
		return units[tenant]
	}
	doc, err := json.Marshal(testnets.ChestClinic())
	if err != nil {
		t.Fatal(err)
	}
	submit := func(tenant string, blocks int) *jobs.Job {
		t.Helper()
		ctx := jobs.WithPrincipal(e.ctx, jobs.Principal{Tenant: tenant})
		if _, _, err := e.svc.PutModel(ctx, doc); err != nil {
			t.Fatalf("PutModel for %s: %v", tenant, err)
		}
		j, created, err := e.svc.Submit(ctx, &infer.Query{Model: "chest-clinic", Method: infer.MethodForward,
			Stop: infer.StopRule{MaxSamples: int64(blocks) * sampling.DefaultBlockSize}, Seed: seed(uint64(blocks))})
		if err != nil || !created {
			t.Fatalf("Submit for %s: created %v, %v", tenant, created, err)
		}
		return j
	}
	if big {
		submit("atlas", 1000)
		for range warm {
			if !e.runOnce("w") {
				t.Fatalf("the big job gave no work")
			}
		}
	}
	bigBefore := count("atlas")
	small := submit("birch", smallBlocks)
	start := clock.Now()
	for i := 0; ; i++ {
		if i > 10*smallBlocks+1000 {
			t.Fatalf("the small job did not finish in %d units", i)
		}
		e.runOnce("w")
		j, err := e.svc.Get(jobs.WithPrincipal(e.ctx, jobs.Principal{Admin: true}), small.ID)
		if err != nil {
			t.Fatal(err)
		}
		if j.State.Terminal() {
			if j.State != jobs.StateSucceeded || j.Result.Samples != int64(smallBlocks)*sampling.DefaultBlockSize {
				t.Fatalf("small job ended %s with %d samples; want succeeded with %d", j.State, j.Result.Samples, smallBlocks*sampling.DefaultBlockSize)
			}
			break
		}
	}
	return fairRun{smallUnits: count("birch"), bigUnits: count("atlas") - bigBefore, latency: clock.Now().Sub(start)}
}

// A tenant's small job does not wait for another tenant's big job: it
// gets worker time in proportion to the tenants' shares. The bounds come
// from the policy of fair.go: with one worker, the tenant with the
// smallest pass (worker time / share) goes next, ties to "atlas" (name
// order, the worst case for the small job), and a newcomer starts at the
// pass of the tenant already there. With unit times dA, dB and shares sA,
// sB, let r = (dB/sB) / (dA/sA). The small job's k-th unit runs once its
// pass, (k-1)·dB/sB above the start, is below the big tenant's, m·dA/sA
// above it; and the big tenant runs a unit only while its pass is not
// above the small one's. So the big job runs m units meanwhile with
// (k-1)·r <= m <= (k-1)·r + 1, and the small job's latency is
// k·dB + m·dA, against k·dB when it runs alone. Without fair shares the
// older big job, at the same priority, would go first for all its 1000
// blocks.
func TestFairShareSmallJobLatency(t *testing.T) {
	const k, warm = 6, 5
	d := time.Second / 64 // a binary fraction: passes add up exactly
	for _, c := range []struct {
		name   string
		shares map[string]float64
		unit   map[string]time.Duration
	}{
		{"equal shares", map[string]float64{"atlas": 1, "birch": 1}, map[string]time.Duration{"atlas": d, "birch": d}},
		{"big tenant share 3", map[string]float64{"atlas": 3, "birch": 1}, map[string]time.Duration{"atlas": d, "birch": d}},
		{"small tenant share 3", map[string]float64{"atlas": 1, "birch": 3}, map[string]time.Duration{"atlas": d, "birch": d}},
		{"big job's units 4x longer", map[string]float64{"atlas": 1, "birch": 1}, map[string]time.Duration{"atlas": 4 * d, "birch": d}},
	} {
		t.Run(c.name, func(t *testing.T) {
			alone := measureFairness(t, c.shares, c.unit, false, warm, k)
			with := measureFairness(t, c.shares, c.unit, true, warm, k)
			dA, dB := c.unit["atlas"].Seconds(), c.unit["birch"].Seconds()
			r := (dB / c.shares["birch"]) / (dA / c.shares["atlas"])
			lo, hi := float64(k-1)*r, float64(k-1)*r+1
			bound := time.Duration(k)*c.unit["birch"] + time.Duration(math.Floor(hi+1e-9))*c.unit["atlas"]
			t.Logf("small job of %d blocks: alone %d units, %v; beside the big job %d units + %d of the big job, %v (bound %v; the big job has 1000 blocks)",
				k, alone.smallUnits, alone.latency, with.smallUnits, with.bigUnits, with.latency, bound)
			if alone.smallUnits != k || alone.bigUnits != 0 || alone.latency != time.Duration(k)*c.unit["birch"] {
				t.Fatalf("alone: %+v; want %d units in %v", alone, k, time.Duration(k)*c.unit["birch"])
			}
			if with.smallUnits != k {
				t.Fatalf("the small job ran %d units; want %d", with.smallUnits, k)
			}
			if m := float64(with.bigUnits); m < lo-1e-9 || m > hi+1e-9 {
				t.Fatalf("the big job ran %d units while the small one ran; the shares allow %.2f to %.2f", with.bigUnits, lo, hi)
			}
			if with.latency > bound {
				t.Fatalf("small job latency %v beside the big job exceeds the bound %v", with.latency, bound)
			}
		})
	}
}

// Within a tenant, priority still orders the jobs: the tenant's high
// priority job takes the tenant's turns first, while the other tenant
// keeps its share.
func TestFairSharePriorityWithinTenant(t *testing.T) {
	clock := jobstest.NewClock(time.Date(2031, 3, 4, 5, 6, 7, 0, time.UTC))
	e := newEnv(t, jobs.Config{}, clock)
	var (
		mu  sync.Mutex
		ran []string
	)
	jobs.SetHookUnit(e.svc, func(j *jobs.Job, _ int64) {
		clock.Advance(time.Second / 64)
		mu.Lock()
		ran = append(ran, j.Tenant+"/"+j.Priority.String())
		mu.Unlock()
	})
	doc, err := json.Marshal(testnets.ChestClinic())
	if err != nil {
		t.Fatal(err)
	}
	submit := func(tenant, prio string) {
		t.Helper()
		ctx := jobs.WithPrincipal(context.Background(), jobs.Principal{Tenant: tenant})
		if _, _, err := e.svc.PutModel(ctx, doc); err != nil {
			t.Fatal(err)
		}
		if _, _, err := e.svc.Submit(ctx, &infer.Query{Model: "chest-clinic", Method: infer.MethodForward, Priority: prio,
			Stop: infer.StopRule{MaxSamples: 100 * sampling.DefaultBlockSize}, Seed: seed(5)}); err != nil {
			t.Fatal(err)
		}
	}
	submit("atlas", "low")
	submit("atlas", "high")
	submit("birch", "normal")
	for range 8 {
		e.runOnce("w")
	}
	want := "[atlas/high birch/normal atlas/high birch/normal atlas/high birch/normal atlas/high birch/normal]"
	if got := fmt.Sprint(ran); got != want {
		t.Fatalf("units ran %s; want %s", got, want)
	}
}
