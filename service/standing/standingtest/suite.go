// Package standingtest is the conformance suite that every standing.Store
// passes (the memory store and the Redis store), plus a brute-force
// enumerator that tests use as an independent check value.
package standingtest

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/sampling"
	"github.com/beliefd/beliefd/service/standing"
)

// NewStore returns an empty store for one subtest.
type NewStore func(t *testing.T) standing.Store

// Run runs the suite against the stores newStore returns.
func Run(t *testing.T, newStore NewStore) {
	tests := []struct {
		name string
		fn   func(t *testing.T, st standing.Store)
	}{
		{"CreateGetList", testCreateGetList},
		{"Limit", testLimit},
		{"Delete", testDelete},
		{"SetEvidence", testSetEvidence},
		{"ClaimOnChange", testClaimOnChange},
		{"ClaimOnInterval", testClaimOnInterval},
		{"LeaseExpiry", testLeaseExpiry},
		{"ConcurrentClaims", testConcurrentClaims},
		{"OutcomeOrdering", testOutcomeOrdering},
		{"CompleteDeleted", testCompleteDeleted},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) { tc.fn(t, newStore(t)) })
	}
}

// base is a fixed instant, whole milliseconds (stores may keep times in ms).
var base = time.Date(2026, 3, 1, 12, 0, 0, 0, time.UTC)

// Rec returns a new record of tenant and id, created at base.
func Rec(tenant, id string, ev map[string]string) *standing.Record {
	if ev == nil {
		ev = map[string]string{}
	}
	return &standing.Record{
		Key:      standing.Key{Tenant: tenant, ID: id},
		Spec:     standing.Spec{ID: id, Model: "m", Targets: []string{"a", "b"}, Method: infer.MethodExact, Evidence: ev},
		Interval: time.Minute, CreatedAt: base, Evidence: ev, Revision: 1, EvidenceAt: base,
	}
}

// result is a result document with one sampled target.
func result(p float64) *infer.Result {
	return &infer.Result{
		Method: infer.MethodLikelihoodWeighting, Seed: 7, Samples: 1000, EffectiveSamples: 812.5, Confidence: 0.95,
		StopReason: "max_samples", Caution: infer.Caution,
		Marginals: map[string]map[string]sampling.Interval{
			"a": {"ok": {P: 1 - p, Lo: 1 - p - 0.01, Hi: 1 - p + 0.01}, "bad": {P: p, Lo: p - 0.01, Hi: p + 0.01}},
		},
	}
}

func ok(p float64, rev int64, at time.Time) *standing.Outcome {
	return &standing.Outcome{Revision: rev, Evidence: map[string]string{"x": fmt.Sprint(rev)}, At: at, Result: result(p)}
}

func must(t *testing.T, err error) {
	t.Helper()
	if err != nil {
		t.Fatal(err)
	}
}

func testCreateGetList(t *testing.T, st standing.Store) {
	ctx := context.Background()
	must(t, st.Create(ctx, Rec("", "one", map[string]string{"alarm": "firing"}), 0))
	must(t, st.Create(ctx, Rec("teal", "one", nil), 0)) // the same ID in another tenant
	must(t, st.Create(ctx, Rec("", "two", nil), 0))
	if err := st.Create(ctx, Rec("", "one", nil), 0); !errors.Is(err, standing.ErrExists) {
		t.Fatalf("second create of one: err = %v, want ErrExists", err)
	}
	got, err := st.Get(ctx, standing.Key{ID: "one"})
	must(t, err)
	if got.Revision != 1 || got.Evidence["alarm"] != "firing" || got.Spec.Model != "m" || len(got.Spec.Targets) != 2 ||
		got.Interval != time.Minute || !got.CreatedAt.Equal(base) || got.Result != nil || got.Failure != nil {
		t.Fatalf("get one = %+v", got)
	}
	got.Evidence["alarm"] = "changed by the caller"
	again, err := st.Get(ctx, standing.Key{ID: "one"})
	must(t, err)
	if again.Evidence["alarm"] != "firing" {
		t.Fatal("a returned record shares memory with the store")
	}
	if _, err := st.Get(ctx, standing.Key{Tenant: "other", ID: "one"}); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("get in another tenant: err = %v, want ErrNotFound", err)
	}
	list, err := st.List(ctx)
	must(t, err)
	var keys []standing.Key
	for _, r := range list {
		keys = append(keys, r.Key)
	}
	want := []standing.Key{{ID: "one"}, {Tenant: "teal", ID: "one"}, {ID: "two"}}
	if fmt.Sprint(keys) != fmt.Sprint(want) {
		t.Fatalf("list = %v, want %v (oldest first)", keys, want)
	}
}

func testLimit(t *testing.T, st standing.Store) {
	ctx := context.Background()
	must(t, st.Create(ctx, Rec("a", "q1", nil), 2))
	must(t, st.Create(ctx, Rec("b", "q1", nil), 2))
	if err := st.Create(ctx, Rec("c", "q1", nil), 2); !errors.Is(err, standing.ErrLimit) {
		t.Fatalf("third create with max 2: err = %v, want ErrLimit", err)
	}
	must(t, st.Delete(ctx, standing.Key{Tenant: "a", ID: "q1"}))
	must(t, st.Create(ctx, Rec("c", "q1", nil), 2))
	list, err := st.List(ctx)
	must(t, err)
	if len(list) != 2 {
		t.Fatalf("%d records, want 2", len(list))
	}
}

func testDelete(t *testing.T, st standing.Store) {
	ctx := context.Background()
	k := standing.Key{ID: "gone"}
	must(t, st.Create(ctx, Rec("", "gone", nil), 0))
	if r, err := st.Claim(ctx, k, "p1", time.Now(), time.Hour); err != nil || r == nil {
		t.Fatalf("claim: %v, %v", r, err)
	}
	must(t, st.Delete(ctx, k))
	if _, err := st.Get(ctx, k); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("get after delete: err = %v, want ErrNotFound", err)
	}
	if err := st.Delete(ctx, k); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("second delete: err = %v, want ErrNotFound", err)
	}
	list, err := st.List(ctx)
	must(t, err)
	if len(list) != 0 {
		t.Fatalf("list after delete has %d records", len(list))
	}
	// The lease went with the record: a new registration is claimable at once.
	must(t, st.Create(ctx, Rec("", "gone", nil), 0))
	if r, err := st.Claim(ctx, k, "p2", time.Now(), time.Hour); err != nil || r == nil {
		t.Fatalf("claim after re-create: %v, %v (the old lease survived the delete)", r, err)
	}
}

func testSetEvidence(t *testing.T, st standing.Store) {
	ctx := context.Background()
	k := standing.Key{Tenant: "t", ID: "ev"}
	must(t, st.Create(ctx, Rec("t", "ev", nil), 0))
	at := base.Add(time.Minute)
	r, err := st.SetEvidence(ctx, k, 1, map[string]string{"alarm": "firing"}, at)
	must(t, err)
	if r.Revision != 2 || r.Evidence["alarm"] != "firing" || !r.EvidenceAt.Equal(at) {
		t.Fatalf("after set: %+v", r)
	}
	if _, err := st.SetEvidence(ctx, k, 1, map[string]string{}, at); !errors.Is(err, standing.ErrConflict) {
		t.Fatalf("set at stale revision 1: err = %v, want ErrConflict", err)
	}
	r, err = st.SetEvidence(ctx, k, 2, map[string]string{}, at)
	must(t, err)
	if r.Revision != 3 || len(r.Evidence) != 0 {
		t.Fatalf("after clearing: %+v", r)
	}
	if _, err := st.SetEvidence(ctx, standing.Key{ID: "none"}, 1, nil, at); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("set on a missing record: err = %v, want ErrNotFound", err)
	}
}

func testClaimOnChange(t *testing.T, st standing.Store) {
	ctx := context.Background()
	k := standing.Key{ID: "c"}
	must(t, st.Create(ctx, Rec("", "c", nil), 0))
	now := time.Now()
	r, err := st.Claim(ctx, k, "p1", now, time.Hour)
	must(t, err)
	if r == nil || r.Revision != 1 {
		t.Fatalf("first claim = %+v, want the record at revision 1", r)
	}
	if r2, err := st.Claim(ctx, k, "p2", now, time.Hour); err != nil || r2 != nil {
		t.Fatalf("claim while p1 holds the lease = %v, %v; want nothing", r2, err)
	}
	kept, err := st.Complete(ctx, k, "p1", ok(0.25, 1, now))
	must(t, err)
	if !kept {
		t.Fatal("the first outcome was not kept")
	}
	if r2, err := st.Claim(ctx, k, "p2", now, time.Hour); err != nil || r2 != nil {
		t.Fatalf("claim of an answered revision = %v, %v; want nothing (computed once)", r2, err)
	}
	_, err = st.SetEvidence(ctx, k, 1, map[string]string{"alarm": "firing"}, now)
	must(t, err)
	r, err = st.Claim(ctx, k, "p2", now, time.Hour)
	must(t, err)
	if r == nil || r.Revision != 2 || r.Evidence["alarm"] != "firing" {
		t.Fatalf("claim after a change = %+v, want revision 2 with the new evidence", r)
	}
	// A release lets another process take it over at once.
	must(t, st.Release(ctx, k, "p2"))
	if r, err := st.Claim(ctx, k, "p3", now, time.Hour); err != nil || r == nil {
		t.Fatalf("claim after release = %v, %v", r, err)
	}
	// Releasing a lease one does not hold changes nothing.
	must(t, st.Release(ctx, k, "p2"))
	if r, err := st.Claim(ctx, k, "p4", now, time.Hour); err != nil || r != nil {
		t.Fatalf("claim while p3 holds the lease = %v, %v", r, err)
	}
}

func testClaimOnInterval(t *testing.T, st standing.Store) {
	ctx := context.Background()
	k := standing.Key{ID: "i"}
	must(t, st.Create(ctx, Rec("", "i", nil), 0)) // interval 1m
	t0 := time.Now().Truncate(time.Millisecond)
	if r, err := st.Claim(ctx, k, "p1", t0, time.Hour); err != nil || r == nil {
		t.Fatalf("claim = %v, %v", r, err)
	}
	if _, err := st.Complete(ctx, k, "p1", ok(0.25, 1, t0)); err != nil {
		t.Fatal(err)
	}
	if r, err := st.Claim(ctx, k, "p1", t0.Add(time.Minute-time.Millisecond), time.Hour); err != nil || r != nil {
		t.Fatalf("claim 1ms before the interval = %v, %v; want nothing", r, err)
	}
	r, err := st.Claim(ctx, k, "p1", t0.Add(time.Minute), time.Hour)
	if err != nil || r == nil || r.Result == nil || r.Result.Revision != 1 {
		t.Fatalf("claim at the interval = %+v, %v; want the record with its result", r, err)
	}
	// A failure counts as an attempt: the next is an interval after it.
	t1 := t0.Add(time.Minute)
	kept, err := st.Complete(ctx, k, "p1", &standing.Outcome{Revision: 1, At: t1, Error: "boom"})
	must(t, err)
	if !kept {
		t.Fatal("a failure newer than the result was not kept")
	}
	if r, err := st.Claim(ctx, k, "p1", t1.Add(time.Second), time.Hour); err != nil || r != nil {
		t.Fatalf("claim right after a failure = %v, %v; want nothing", r, err)
	}
}

func testLeaseExpiry(t *testing.T, st standing.Store) {
	ctx := context.Background()
	k := standing.Key{ID: "l"}
	must(t, st.Create(ctx, Rec("", "l", nil), 0))
	lease := 200 * time.Millisecond
	if r, err := st.Claim(ctx, k, "p1", time.Now(), lease); err != nil || r == nil {
		t.Fatalf("claim = %v, %v", r, err)
	}
	if r, err := st.Claim(ctx, k, "p2", time.Now(), lease); err != nil || r != nil {
		t.Fatalf("claim under the lease = %v, %v", r, err)
	}
	time.Sleep(lease + 150*time.Millisecond)
	if r, err := st.Claim(ctx, k, "p2", time.Now(), lease); err != nil || r == nil {
		t.Fatalf("claim after the lease ended = %v, %v; a stopped holder blocks the query", r, err)
	}
	// The first holder finishes late: its outcome still counts by revision.
	kept, err := st.Complete(ctx, k, "p1", ok(0.3, 1, time.Now()))
	must(t, err)
	if !kept {
		t.Fatal("a late outcome of the current revision was not kept")
	}
}

func testConcurrentClaims(t *testing.T, st standing.Store) {
	ctx := context.Background()
	k := standing.Key{ID: "race"}
	must(t, st.Create(ctx, Rec("", "race", nil), 0))
	var got atomic.Int32
	var wg sync.WaitGroup
	now := time.Now()
	for i := range 16 {
		wg.Add(1)
		go func() {
			defer wg.Done()
			r, err := st.Claim(ctx, k, fmt.Sprintf("p%d", i), now, time.Hour)
			if err != nil {
				t.Error(err)
			}
			if r != nil {
				got.Add(1)
			}
		}()
	}
	wg.Wait()
	if n := got.Load(); n != 1 {
		t.Fatalf("%d of 16 concurrent claims granted, want exactly 1", n)
	}
}

func testOutcomeOrdering(t *testing.T, st standing.Store) {
	ctx := context.Background()
	k := standing.Key{ID: "o"}
	must(t, st.Create(ctx, Rec("", "o", nil), 0))
	for rev := int64(1); rev < 3; rev++ {
		_, err := st.SetEvidence(ctx, k, rev, map[string]string{"x": fmt.Sprint(rev + 1)}, base)
		must(t, err)
	}
	t0 := time.Now().Truncate(time.Millisecond)
	complete := func(o *standing.Outcome, want bool) {
		t.Helper()
		kept, err := st.Complete(ctx, k, "p", o)
		must(t, err)
		if kept != want {
			t.Fatalf("outcome of revision %d at +%s (error %q): kept = %v, want %v", o.Revision, o.At.Sub(t0), o.Error, kept, want)
		}
	}
	complete(ok(0.5, 2, t0), true)
	complete(ok(0.9, 1, t0.Add(time.Second)), false) // late and older: never over a newer one
	complete(ok(0.6, 2, t0.Add(-time.Second)), false)
	complete(ok(0.7, 2, t0.Add(time.Second)), true) // the same revision, finished later
	complete(&standing.Outcome{Revision: 1, At: t0.Add(time.Hour), Error: "old"}, false)
	r, err := st.Get(ctx, k)
	must(t, err)
	if r.Result == nil || r.Result.Revision != 2 || r.Result.Result.Marginals["a"]["bad"].P != 0.7 || r.Failure != nil {
		t.Fatalf("kept %+v / failure %+v, want the result of revision 2 with p = 0.7 and no failure", r.Result, r.Failure)
	}
	if r.Status() != standing.StatusUpdating {
		t.Fatalf("status %s, want updating (revision 3 has no answer)", r.Status())
	}
	res := r.Result.Result
	if iv := res.Marginals["a"]["bad"]; iv.Lo != 0.7-0.01 || iv.Hi != 0.7+0.01 || res.Samples != 1000 || res.EffectiveSamples != 812.5 {
		t.Fatalf("the result lost its interval or sample counts: %+v", res)
	}
	complete(&standing.Outcome{Revision: 3, At: t0.Add(2 * time.Second), Error: "model gone"}, true)
	r, err = st.Get(ctx, k)
	must(t, err)
	if r.Status() != standing.StatusFailed || r.Failure.Error != "model gone" || r.Result.Revision != 2 {
		t.Fatalf("after a failure of revision 3: status %s, %+v", r.Status(), r.Failure)
	}
	complete(ok(0.8, 3, t0.Add(3*time.Second)), true)
	r, err = st.Get(ctx, k)
	must(t, err)
	if r.Status() != standing.StatusCurrent || r.Failure != nil || r.Result.Revision != 3 || r.Result.Evidence["x"] != "3" {
		t.Fatalf("after a result of revision 3: status %s, result %+v, failure %+v", r.Status(), r.Result, r.Failure)
	}
}

func testCompleteDeleted(t *testing.T, st standing.Store) {
	ctx := context.Background()
	k := standing.Key{ID: "d"}
	must(t, st.Create(ctx, Rec("", "d", nil), 0))
	must(t, st.Delete(ctx, k))
	if _, err := st.Complete(ctx, k, "p", ok(0.1, 1, time.Now())); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("complete after delete: err = %v, want ErrNotFound", err)
	}
	if _, err := st.Get(ctx, k); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("a late outcome brought a deleted standing query back: %v", err)
	}
	if _, err := st.Claim(ctx, k, "p", time.Now(), time.Minute); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("claim after delete: err = %v, want ErrNotFound", err)
	}
}
