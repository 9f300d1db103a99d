package memstore_test

import (
	"context"
	"errors"
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
	if _, _, err := s.CreateJob(ctx, newJob("j"), 0); err != nil {
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
	if _, _, err := s.CreateJob(ctx, j, 0); err != nil {
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
	if js, _ := s.ListJobs(ctx, "", 10); len(js) != 0 {
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
