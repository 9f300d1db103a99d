package redisstore

import (
	"errors"
	"fmt"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"

	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/jobstest"
	"github.com/beliefd/beliefd/worker/redisstore/redistest"
)

// Timing of the sweep tests: a short write window, so that interrupted
// creations are settled soon, with the test skew margin. The grace period
// is window + 2 x skew margin = 300ms.
const testWindow = 100 * time.Millisecond

// sweepStore is a store with the short write window, no sweeper of its own
// (the tests sweep), and the test skew margin.
func sweepStore(t *testing.T, url string, opt Options) *Store {
	t.Helper()
	opt.createWindow = testWindow
	opt.SweepEvery = -1
	return newStore(t, url, opt)
}

func mustSweep(t *testing.T, s *Store) SweepReport {
	t.Helper()
	rep, err := s.Sweep(ctxFor(t))
	if err != nil {
		t.Fatalf("Sweep: %v", err)
	}
	return rep
}

// reserveOnly runs step 1 of CreateJob and stops, as a process that dies
// right after it would.
func reserveOnly(t *testing.T, s *Store, id, tenant, key string) []string {
	t.Helper()
	sha := ""
	if key != "" {
		sha = idemSum(key)
	}
	res, err := reserveJobScript.Run(ctxFor(t), s.rdb, []string{s.k.meta()}, s.k.global(), id, tenant, 0, 0, 1, "tok-"+id, sha).StringSlice()
	if err != nil || res[0] != "reserved" {
		t.Fatalf("reserve %s: %v, %v", id, res, err)
	}
	return res
}

func unfinishedOf(t *testing.T, s *Store, tenant string) string {
	t.Helper()
	q, r, err := s.UnfinishedOf(ctxFor(t), tenant)
	if err != nil {
		t.Fatal(err)
	}
	return fmt.Sprintf("%d queued, %d running", q, r)
}

// A creation interrupted after the reservation holds a place in the
// quota, the listing and the queue, with no record. Within the write
// window the sweep leaves it alone (the creator may still write); after
// the window plus twice the skew margin it undoes it, and the
// idempotency key is free again. A record written after the window is
// refused, so the sweep can never undo a job that has a record.
func TestSweepUndoesInterruptedCreation(t *testing.T) {
	url := redistest.Start(t)
	s := sweepStore(t, url, Options{})
	ctx := ctxFor(t)
	res := reserveOnly(t, s, "J", "acme", "nightly")
	if got := unfinishedOf(t, s, "acme"); got != "1 queued, 0 running" {
		t.Fatalf("after the reservation: %s", got)
	}
	if rep := mustSweep(t, s); rep.Repairs() != 0 {
		t.Fatalf("a sweep within the grace period repaired %+v; want nothing", rep)
	}
	// Another submission with the key waits for the job being created,
	// and gives up with ErrConflict when it does not appear.
	dup := testJob("J2")
	dup.Tenant, dup.IdempotencyKey = "acme", "nightly"
	start := time.Now()
	if _, _, err := s.CreateJob(ctx, dup, jobs.CreateLimits{}); !errors.Is(err, jobs.ErrConflict) {
		t.Fatalf("CreateJob with the key of a creation in progress: %v; want ErrConflict", err)
	}
	if waited := time.Since(start); waited < idemWait {
		t.Fatalf("CreateJob gave up after %v; it waits %v for the job being created", waited, idemWait)
	}
	// idemWait (2s) is past the grace period (300ms): the late write fails.
	w, err := writeJobScript.Run(ctx, s.rdb, []string{s.k.job("J").rec}, `{"id":"J"}`, "tok-J", res[1], "acme", res[2], s.window.Milliseconds(), 1, 1000).Text()
	if err != nil || w != "stale" {
		t.Fatalf("a record written after the window: %s, %v; want stale", w, err)
	}
	rep := mustSweep(t, s)
	if rep.Creations != 1 || rep.Undone != 1 {
		t.Fatalf("sweep after the grace period: %+v; want 1 creation undone", rep)
	}
	if got := unfinishedOf(t, s, "acme"); got != "0 queued, 0 running" {
		t.Fatalf("after the sweep: %s", got)
	}
	for _, k := range []string{s.k.jobIndex(), s.k.tenant("acme", "jobs"), s.k.meta(), s.k.creating(), s.k.active(), s.k.idem("acme", "nightly")} {
		if n, _ := s.rdb.Exists(ctx, k).Result(); n != 0 {
			t.Errorf("%s still exists after the reservation was undone", k)
		}
	}
	if got, created, err := s.CreateJob(ctx, dup, jobs.CreateLimits{}); err != nil || !created || got.ID != "J2" {
		t.Fatalf("CreateJob with the freed key = %v, %v, %v; want J2 created", got, created, err)
	}
	if rep := mustSweep(t, s); rep.Repairs() != 0 {
		t.Fatalf("a second sweep repaired %+v; want nothing", rep)
	}
}

// A creation interrupted after the record was written is completed by
// the sweep: the job stays, queued and listed.
func TestSweepCompletesInterruptedCreation(t *testing.T) {
	url := redistest.Start(t)
	s := sweepStore(t, url, Options{})
	ctx := ctxFor(t)
	res := reserveOnly(t, s, "J", "acme", "")
	data := `{"id":"J","tenant":"acme","state":"queued","priority":1}`
	w, err := writeJobScript.Run(ctx, s.rdb, []string{s.k.job("J").rec}, data, "tok-J", res[1], "acme", res[2], s.window.Milliseconds(), 1, 1000).Text()
	if err != nil || w != "created" {
		t.Fatalf("write within the window: %s, %v", w, err)
	}
	time.Sleep(s.grace + 50*time.Millisecond)
	rep := mustSweep(t, s)
	if rep.Creations != 1 || rep.Undone != 0 {
		t.Fatalf("sweep: %+v; want 1 creation completed", rep)
	}
	if n, _ := s.rdb.HLen(ctx, s.k.creating()).Result(); n != 0 {
		t.Fatalf("%d creations still in progress", n)
	}
	if js, err := s.ListJobs(ctx, "acme", "", 0); err != nil || len(js) != 1 || js[0].ID != "J" {
		t.Fatalf("ListJobs(acme) = %v, %v; want J", js, err)
	}
	if cl, err := s.ClaimableJobs(ctx, 0); err != nil || fmt.Sprint(cl) != "[{J acme normal}]" {
		t.Fatalf("ClaimableJobs = %v, %v", cl, err)
	}
}

// An update interrupted between its two steps (the record stored, the
// indexes not) leaves a finished job counted and queued; the sweep
// places it by its record. A record gone without its indexes being told
// (expired) is forgotten.
func TestSweepRepairsInterruptedUpdate(t *testing.T) {
	url := redistest.Start(t)
	s := sweepStore(t, url, Options{})
	ctx := ctxFor(t)
	for _, id := range []string{"A", "B", "C"} {
		j := testJob(id)
		j.Tenant = "acme"
		create(t, s, j)
	}
	// A finishes: only step 1, the compare-and-swap on {job:A}.
	jk := s.k.job("A")
	if res, err := updateJobScript.Run(ctx, s.rdb, []string{jk.rec, jk.next, jk.leases, jk.holders, jk.stats},
		"1", "tok", `{"id":"A","tenant":"acme","state":"succeeded"}`, "succeeded", 60_000, 1).Text(); err != nil || res != "ok" {
		t.Fatalf("update A: %s, %v", res, err)
	}
	// B starts: step 1 only.
	jk = s.k.job("B")
	if res, err := updateJobScript.Run(ctx, s.rdb, []string{jk.rec, jk.next, jk.leases, jk.holders, jk.stats},
		"1", "tok", `{"id":"B","tenant":"acme","state":"running"}`, "running", 60_000, 1).Text(); err != nil || res != "ok" {
		t.Fatalf("update B: %s, %v", res, err)
	}
	// C's record disappears.
	if err := s.rdb.Del(ctx, s.k.job("C").rec).Err(); err != nil {
		t.Fatal(err)
	}
	if got := unfinishedOf(t, s, "acme"); got != "3 queued, 0 running" {
		t.Fatalf("before the sweep: %s", got)
	}
	// A reader that finds no record may have read just before a
	// creation's write landed: the first sweep leaves C alone, the next
	// one, finding it missing again, forgets it.
	rep := mustSweep(t, s)
	if rep.Resynced != 2 || rep.Forgotten != 0 {
		t.Fatalf("first sweep: %+v; want 2 resynced, none forgotten", rep)
	}
	if rep := mustSweep(t, s); rep.Forgotten != 1 || rep.Resynced != 0 {
		t.Fatalf("second sweep: %+v; want 1 forgotten", rep)
	}
	if got := unfinishedOf(t, s, "acme"); got != "0 queued, 1 running" {
		t.Fatalf("after the sweep: %s; want B running only", got)
	}
	if cl, err := s.ClaimableJobs(ctx, 0); err != nil || fmt.Sprint(cl) != "[{B acme normal}]" {
		t.Fatalf("ClaimableJobs = %v, %v; want B", cl, err)
	}
	if sc, err := s.rdb.ZScore(ctx, s.k.expiring(), "A").Result(); err != nil || sc == 0 {
		t.Fatalf("A is not in the expiring index: %v", err)
	}
	if rep := mustSweep(t, s); rep.Repairs() != 0 {
		t.Fatalf("a second sweep repaired %+v; want nothing", rep)
	}
}

// A caller that read no record just before a creation's write landed must
// not forget the job the creation has completed meanwhile: forgetJob
// without a token leaves a complete job alone unless forced.
func TestForgetLeavesCompleteJobAlone(t *testing.T) {
	url := redistest.Start(t)
	s := sweepStore(t, url, Options{})
	ctx := ctxFor(t)
	j := testJob("A")
	j.IdempotencyKey = "k"
	create(t, s, j)
	res, err := forgetJobScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(), "A", "", s.k.idem(j.Tenant, "k"), "").Text()
	if err != nil || res != "exists" {
		t.Fatalf("forget of a complete job = %q, %v; want exists", res, err)
	}
	if _, created, err := s.CreateJob(ctx, testJob("B"), jobs.CreateLimits{}); err != nil || !created {
		t.Fatalf("CreateJob(B): %v", err)
	}
	k := testJob("C")
	k.IdempotencyKey = "k"
	got, created, err := s.CreateJob(ctx, k, jobs.CreateLimits{})
	if err != nil || created || got.ID != "A" {
		t.Fatalf("CreateJob with A's key = %v created %v, %v; want A, not created", got, created, err)
	}
	res, err = forgetJobScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(), "A", "", "", "force").Text()
	if err != nil || res != "forgotten" {
		t.Fatalf("forced forget = %q, %v; want forgotten", res, err)
	}
}

// A model put interrupted before its name was listed is listed by the
// sweep; a put that stopped before storing anything leaves no trace; a
// listed name without a model is dropped.
func TestSweepRepairsModels(t *testing.T) {
	url := redistest.Start(t)
	s := sweepStore(t, url, Options{})
	ctx := ctxFor(t)
	announce := func(name string) string {
		mark, err := announceModelScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(), name, "x").Text()
		if err != nil {
			t.Fatal(err)
		}
		return mark
	}
	announce("stored")
	mk := s.k.model("stored")
	if err := putModelScript.Run(ctx, s.rdb, []string{mk.head, mk.info, mk.doc}, "h", `{"name":"stored"}`, "{}", "tok").Err(); err != nil {
		t.Fatal(err)
	}
	announce("never")
	if err := s.rdb.ZAdd(ctx, s.k.models(), redisZ("ghost")).Err(); err != nil {
		t.Fatal(err)
	}
	if rep := mustSweep(t, s); rep.ModelsListed != 0 || rep.ModelsUnlisted != 1 {
		t.Fatalf("sweep within the grace period: %+v; want only the ghost dropped", rep)
	}
	time.Sleep(s.grace + 50*time.Millisecond)
	if rep := mustSweep(t, s); rep.ModelsListed != 1 || rep.ModelsUnlisted != 0 {
		t.Fatalf("sweep after the grace period: %+v; want 1 listed", rep)
	}
	infos, err := s.ListModels(ctx, "", 0)
	if err != nil || len(infos) != 1 || infos[0].Name != "stored" {
		t.Fatalf("ListModels = %+v, %v; want stored", infos, err)
	}
	if n, _ := s.rdb.Exists(ctx, s.k.modelPuts()).Result(); n != 0 {
		t.Fatalf("puts in progress are left")
	}
}

// The Store sweeps by itself, one process at a time.
func TestSweeper(t *testing.T) {
	url := redistest.Start(t)
	prefix := redistest.KeyPrefix(t, url)
	const every = 200 * time.Millisecond
	a := newStore(t, url, Options{KeyPrefix: prefix, SweepEvery: every, createWindow: testWindow})
	newStore(t, url, Options{KeyPrefix: prefix, SweepEvery: every, createWindow: testWindow})
	reserveOnly(t, a, "J", "acme", "")
	jobstest.Eventually(t, 10*time.Second, "the sweeper undoes an interrupted creation", func() bool {
		return unfinishedOf(t, a, "acme") == "0 queued, 0 running"
	})
}

func redisZ(member string) redis.Z { return redis.Z{Member: member} }
