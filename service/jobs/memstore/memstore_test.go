package memstore_test

import (
	"context"
	"errors"
	"fmt"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/jobstest"
	"github.com/beliefd/beliefd/service/jobs/memstore"
)

func TestConformance(t *testing.T) {
	jobstest.CheckGoroutines(t)
	jobstest.Run(t, func(t *testing.T) jobs.Store {
		s := memstore.New(memstore.Options{})
		t.Cleanup(func() { _ = s.Close() })
		return s
	})
}

func newJob(id string) *jobs.Job {
	return &jobs.Job{ID: id, Blocks: 10, BlockSize: 8, Retention: time.Hour, CreatedAt: time.Unix(0, 0)}
}

// The lease clock is the injected one: a lease ends exactly at
// claim time + lease + skew margin, and not a nanosecond earlier.
func TestLeaseClock(t *testing.T) {
	ctx := context.Background()
	clock := jobstest.NewClock(time.Date(2030, 1, 1, 0, 0, 0, 0, time.UTC))
	const lease, margin = 10 * time.Second, 2 * time.Second
	s := memstore.New(memstore.Options{Clock: clock.Now, SkewMargin: margin})
	if _, _, err := s.CreateJob(ctx, newJob("j"), jobs.CreateLimits{}); err != nil {
		t.Fatal(err)
	}
	if b, _ := s.ClaimBlock(ctx, "j", "w1", 1, lease); b != 0 {
		t.Fatalf("claim = %d", b)
	}
	clock.Advance(lease + margin)
	if b, _ := s.ClaimBlock(ctx, "j", "w2", 1, lease); b != -1 {
		t.Fatalf("claim at the end of lease+margin = %d; want -1 (still held)", b)
	}
	// Within the margin the holder may still renew.
	if err := s.ExtendLease(ctx, "j", 0, "w1", lease); err != nil {
		t.Fatalf("ExtendLease within the margin: %v", err)
	}
	clock.Advance(lease + margin + time.Nanosecond)
	if err := s.ExtendLease(ctx, "j", 0, "w1", lease); !errors.Is(err, jobs.ErrLeaseLost) {
		t.Fatalf("ExtendLease after lease+margin: %v; want ErrLeaseLost", err)
	}
	if b, _ := s.ClaimBlock(ctx, "j", "w2", 1, lease); b != 0 {
		t.Fatalf("claim after lease+margin = %d; want 0", b)
	}
	if err := s.CommitBlock(ctx, "j", 0, "w1", []byte("{}")); !errors.Is(err, jobs.ErrLeaseLost) {
		t.Fatalf("commit by the old holder: %v; want ErrLeaseLost", err)
	}
}

// Retention runs on the injected clock.
func TestRetentionClock(t *testing.T) {
	ctx := context.Background()
	clock := jobstest.NewClock(time.Date(2030, 1, 1, 0, 0, 0, 0, time.UTC))
	s := memstore.New(memstore.Options{Clock: clock.Now})
	j := newJob("j")
	j.Retention = time.Hour
	if _, _, err := s.CreateJob(ctx, j, jobs.CreateLimits{}); err != nil {
		t.Fatal(err)
	}
	clock.Advance(5 * time.Hour) // unfinished jobs never expire
	if _, err := s.UpdateJob(ctx, "j", func(j *jobs.Job) error { j.State = jobs.StateFailed; return nil }); err != nil {
		t.Fatal(err)
	}
	clock.Advance(time.Hour - time.Nanosecond)
	if _, err := s.GetJob(ctx, "j"); err != nil {
		t.Fatalf("expired early: %v", err)
	}
	clock.Advance(time.Nanosecond)
	if _, err := s.GetJob(ctx, "j"); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("GetJob after retention: %v; want ErrNotFound", err)
	}
	if js, _ := s.ListJobs(ctx, jobs.AllTenants, "", 10); len(js) != 0 {
		t.Fatalf("ListJobs lists an expired job")
	}
}

func TestClosed(t *testing.T) {
	ctx := context.Background()
	s := memstore.New(memstore.Options{})
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	if err := s.Ping(ctx); !errors.Is(err, jobs.ErrUnavailable) {
		t.Fatalf("Ping after Close: %v; want ErrUnavailable", err)
	}
	if _, err := s.GetJob(ctx, "x"); !errors.Is(err, jobs.ErrUnavailable) {
		t.Fatalf("GetJob after Close: %v; want ErrUnavailable", err)
	}
}

// Subscriptions end with their context without leaving goroutines behind.
func TestSubscribeContext(t *testing.T) {
	jobstest.CheckGoroutines(t)
	s := memstore.New(memstore.Options{})
	for range 100 {
		ctx, cancel := context.WithCancel(context.Background())
		if _, _, err := s.Subscribe(ctx, "t"); err != nil {
			t.Fatal(err)
		}
		cancel()
	}
}

// Listings stay right as expired jobs leave the per-tenant indexes (which
// compact themselves once half of an index has expired).
func TestTenantIndexesAfterExpiry(t *testing.T) {
	ctx := context.Background()
	clock := jobstest.NewClock(time.Date(2030, 1, 1, 0, 0, 0, 0, time.UTC))
	s := memstore.New(memstore.Options{Clock: clock.Now})
	const n = 100
	want := map[string][]string{}
	for i := range n {
		j := newJob(fmt.Sprintf("j%03d", i))
		j.Tenant = []string{"acme", "birch"}[i%2]
		if _, _, err := s.CreateJob(ctx, j, jobs.CreateLimits{}); err != nil {
			t.Fatal(err)
		}
		// Every job of acme and every third of birch finishes and expires.
		if j.Tenant == "acme" || i%3 == 0 {
			if _, err := s.UpdateJob(ctx, j.ID, func(j *jobs.Job) error { j.State = jobs.StateSucceeded; return nil }); err != nil {
				t.Fatal(err)
			}
			continue
		}
		want[j.Tenant] = append([]string{j.ID}, want[j.Tenant]...)
		want[jobs.AllTenants] = append([]string{j.ID}, want[jobs.AllTenants]...)
	}
	clock.Advance(2 * time.Hour)
	for _, tenant := range []string{"acme", "birch", jobs.AllTenants} {
		var got []string
		after := ""
		for {
			js, err := s.ListJobs(ctx, tenant, after, 7)
			if err != nil {
				t.Fatal(err)
			}
			if len(js) == 0 {
				break
			}
			for _, j := range js {
				got = append(got, j.ID)
			}
			after = js[len(js)-1].ID
		}
		if fmt.Sprint(got) != fmt.Sprint(want[tenant]) {
			t.Fatalf("ListJobs(%q) after expiry = %v; want %v", tenant, got, want[tenant])
		}
	}
	if q, r, err := s.UnfinishedOf(ctx, "birch"); err != nil || q != len(want["birch"]) || r != 0 {
		t.Fatalf("UnfinishedOf(birch) = %d, %d, %v; want %d, 0", q, r, err, len(want["birch"]))
	}
	if cl, err := s.ClaimableJobs(ctx, 0); err != nil || len(cl) != len(want["birch"]) {
		t.Fatalf("ClaimableJobs = %d, %v; want %d", len(cl), err, len(want["birch"]))
	}
}
