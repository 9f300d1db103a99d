package redisstore_test

import (
	"context"
	"errors"
	"log/slog"
	"regexp"
	"sync"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/examples"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/memstore"
	"github.com/beliefd/beliefd/service/standing"
	"github.com/beliefd/beliefd/service/standing/standingtest"
	"github.com/beliefd/beliefd/worker/redisstore"
	"github.com/beliefd/beliefd/worker/redisstore/redistest"
)

func newStanding(t *testing.T, url, prefix string) *redisstore.StandingStore {
	return newStandingOn(t, url, prefix, false)
}

func newStandingOn(t *testing.T, url, prefix string, cluster bool) *redisstore.StandingStore {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	s, err := redisstore.NewStanding(ctx, url, redisstore.Options{KeyPrefix: prefix, Cluster: cluster, Logger: slog.New(slog.DiscardHandler)})
	if err != nil {
		t.Fatalf("NewStanding(%s): %v", url, err)
	}
	t.Cleanup(func() { _ = s.Close() })
	return s
}

// TestStandingConformance runs the suite every standing.Store passes, each
// subtest on an empty key space of one shared server.
func TestStandingConformance(t *testing.T) {
	url := redistest.Start(t)
	standingtest.Run(t, func(t *testing.T) standing.Store {
		return newStanding(t, url, redistest.KeyPrefix(t, url))
	})
}

// TestStandingConformanceCluster runs the same suite on a Redis Cluster of
// three primaries, where a script touching two slots fails with CROSSSLOT.
func TestStandingConformanceCluster(t *testing.T) {
	url := redistest.ClusterURL(t)
	standingtest.Run(t, func(t *testing.T) standing.Store {
		return newStandingOn(t, url, redistest.KeyPrefix(t, url), true)
	})
}

// hashTag is the part of a key Redis Cluster hashes: the text between the
// first '{' and the next '}' (common practice: the cluster specification's
// hash tag rule).
var hashTag = regexp.MustCompile(`\{([^}]*)\}`)

// The keys of one standing query hash to one slot, and different standing
// queries (and tenants) to different tags, so the scripts run on Redis Cluster.
func TestStandingKeysShareHashTag(t *testing.T) {
	url := redistest.Start(t)
	s := newStanding(t, url, redistest.KeyPrefix(t, url))
	tags := map[string]standing.Key{}
	for _, k := range []standing.Key{{ID: "x"}, {Tenant: "teal", ID: "x"}, {Tenant: "plum", ID: "checkout-root-cause"}} {
		keys := s.Keys(k)
		tag := hashTag.FindStringSubmatch(keys[0])
		if tag == nil {
			t.Fatalf("key %s has no hash tag", keys[0])
		}
		for _, key := range keys[1:] {
			if got := hashTag.FindStringSubmatch(key); got == nil || got[1] != tag[1] {
				t.Errorf("%s and %s have different hash tags", keys[0], key)
			}
		}
		if other, ok := tags[tag[1]]; ok {
			t.Errorf("%v and %v share the hash tag %q", k, other, tag[1])
		}
		tags[tag[1]] = k
	}
}

// countingObserver counts recompute outcomes.
type countingObserver struct {
	mu sync.Mutex
	n  map[string]int
}

func (o *countingObserver) Recomputed(outcome string, d time.Duration) {
	o.mu.Lock()
	defer o.mu.Unlock()
	o.n[outcome]++
}

func (o *countingObserver) get(outcome string) int {
	o.mu.Lock()
	defer o.mu.Unlock()
	return o.n[outcome]
}

// Three processes (each its own connection and Service) on one Redis: a
// standing query registered through one is updated through another and
// every revision is computed once among them; each process sees the
// latest result for its gauges, and a delete removes it from all of them.
func TestStandingSharedByProcesses(t *testing.T) {
	url := redistest.Start(t)
	prefix := redistest.KeyPrefix(t, url)
	log := slog.New(slog.DiscardHandler)
	js, err := jobs.NewService(memstore.New(memstore.Options{}), jobs.Config{Logger: log}, nil)
	if err != nil {
		t.Fatal(err)
	}
	raw, _ := examples.Raw("tarnwick-platform")
	if _, _, err := js.PutModel(context.Background(), raw); err != nil {
		t.Fatal(err)
	}
	_, net, _ := examples.Load("tarnwick-platform")
	obs := &countingObserver{n: map[string]int{}}
	var procs []*standing.Service
	for _, owner := range []string{"api-0", "api-1", "api-2"} {
		s, err := standing.New(newStanding(t, url, prefix), js, standing.Config{Owner: owner, Logger: log, Observer: obs})
		if err != nil {
			t.Fatal(err)
		}
		procs = append(procs, s)
	}
	ctx := context.Background()
	if _, err := procs[0].Create(ctx, &standing.Spec{ID: "power", Model: "tarnwick-platform",
		Targets: []string{"site_power", "core_network"}, Evidence: map[string]string{"alarm_power_bus": "firing"}}); err != nil {
		t.Fatal(err)
	}
	updates := []standing.Update{
		{Set: map[string]string{"alarm_switch_ping": "firing"}},
		{Set: map[string]string{"alarm_ups_on_battery": "firing"}},
		{Clear: []string{"alarm_power_bus"}},
	}
	for i := 0; i <= len(updates); i++ {
		if i > 0 {
			if _, err := procs[i%3].UpdateEvidence(ctx, "power", &updates[i-1]); err != nil {
				t.Fatal(err)
			}
		}
		var wg sync.WaitGroup
		for _, p := range procs {
			wg.Add(1)
			go func() {
				defer wg.Done()
				if _, err := p.Step(ctx); err != nil {
					t.Error(err)
				}
			}()
		}
		wg.Wait()
		if got := obs.get(standing.OutcomeKept); got != i+1 {
			t.Fatalf("revision %d: %d results kept in all (%v), want one per revision", i+1, got, obs.n)
		}
	}
	if obs.get(standing.OutcomeSuperseded) != 0 {
		t.Fatalf("a revision was computed twice: %v", obs.n)
	}
	for i, p := range procs {
		if _, err := p.Step(ctx); err != nil {
			t.Fatal(err)
		}
		snap := p.Snapshot()
		if len(snap) != 1 || snap[0].ResultRevision != 4 || snap[0].Status != standing.StatusCurrent {
			t.Fatalf("process %d sees %+v", i, snap)
		}
		want, err := standingtest.Enumerate(net, snap[0].ResultEvidence, "site_power")
		if err != nil {
			t.Fatal(err)
		}
		// Brute-force enumeration and the junction tree add the same
		// products in another order: they agree to rounding.
		got := snap[0].Result.Marginals["site_power"]["lost"]
		if snap[0].Result.Method != infer.MethodExact || abs(got.P-want["lost"]) > 1e-12 || got.Lo != got.P || got.Hi != got.P {
			t.Fatalf("process %d: %s P(site_power=lost) = %+v, brute force %v", i, snap[0].Result.Method, got, want["lost"])
		}
	}
	if err := procs[2].Delete(ctx, "power"); err != nil {
		t.Fatal(err)
	}
	for i, p := range procs {
		if _, err := p.Step(ctx); err != nil {
			t.Fatal(err)
		}
		if n := len(p.Snapshot()); n != 0 {
			t.Fatalf("process %d still exports %d standing queries after the delete", i, n)
		}
	}
}

func abs(x float64) float64 {
	if x < 0 {
		return -x
	}
	return x
}

// With Redis stopped, every call fails fast with ErrUnavailable, and works
// again once it is back.
func TestStandingRedisOutage(t *testing.T) {
	srv := redistest.StartServer(t, redistest.Options{AppendOnly: true})
	s := newStanding(t, srv.URL(), "outage")
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	if err := s.Create(ctx, standingtest.Rec("", "q", nil), 0); err != nil {
		t.Fatal(err)
	}
	srv.Stop()
	if _, err := s.List(ctx); !errors.Is(err, jobs.ErrUnavailable) {
		t.Fatalf("list with Redis down: err = %v, want ErrUnavailable", err)
	}
	if _, err := s.Claim(ctx, standing.Key{ID: "q"}, "p", time.Now(), time.Minute); !errors.Is(err, jobs.ErrUnavailable) {
		t.Fatalf("claim with Redis down: err = %v, want ErrUnavailable", err)
	}
	srv.StartAgain()
	deadline := time.Now().Add(10 * time.Second)
	for {
		recs, err := s.List(ctx)
		if err == nil {
			if len(recs) != 1 || recs[0].Key.ID != "q" {
				t.Fatalf("after the restart: %+v", recs)
			}
			break
		}
		if time.Now().After(deadline) {
			t.Fatalf("still failing 10s after Redis came back: %v", err)
		}
		time.Sleep(100 * time.Millisecond)
	}
}
