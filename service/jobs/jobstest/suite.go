package jobstest

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/sampling"
)

// Timing of the suite. Leases and retention use the backend's own clock,
// so the suite waits in real time, polling with generous bounds.
const (
	shortLease   = 200 * time.Millisecond
	longLease    = time.Minute
	waitBound    = 10 * time.Second
	settle       = 100 * time.Millisecond
	shortRetains = 300 * time.Millisecond
)

// Run runs the conformance suite against the stores newStore returns, a
// fresh empty one for each subtest (newStore registers its own cleanup).
// Every jobs.Store backend calls it from its tests.
func Run(t *testing.T, newStore func(t *testing.T) jobs.Store) {
	tests := []struct {
		name string
		fn   func(t *testing.T, s jobs.Store)
	}{
		{"Ping", testPing},
		{"ModelVersionsAndDedupe", testModelVersions},
		{"ModelListPagination", testModelList},
		{"ModelDelete", testModelDelete},
		{"JobRoundTrip", testJobRoundTrip},
		{"JobNotFound", testJobNotFound},
		{"JobListNewestFirst", testJobList},
		{"IdempotencyKey", testIdempotency},
		{"QueueFull", testQueueFull},
		{"UpdateAtomic", testUpdateAtomic},
		{"UpdateErrorStoresNothing", testUpdateError},
		{"ClaimEveryBlockOnce", testClaimOnce},
		{"ClaimLimit", testClaimLimit},
		{"LeaseExpiryAndReclaim", testLeaseExpiry},
		{"ExtendLeaseKeepsBlock", testExtendLease},
		{"DoubleCommitKeepsFirst", testDoubleCommit},
		{"ReleaseBlock", testRelease},
		{"BlockStatsStopAtGap", testBlockStatsGap},
		{"DropBlocks", testDropBlocks},
		{"TerminalNotClaimable", testTerminal},
		{"RetentionExpiry", testRetention},
		{"NotifyCoalesces", testNotify},
		{"SubscribeEnds", testSubscribeEnds},
		{"ClaimablePriorityOrder", testPriorityOrder},
		{"TenantListing", testTenantListing},
		{"TenantQuota", testTenantQuota},
		{"TenantIdempotency", testTenantIdempotency},
		{"TenantClaimable", testTenantClaimable},
		{"TenantFixed", testTenantFixed},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			tc.fn(t, newStore(t))
		})
	}
}

func ctxFor(t *testing.T) context.Context {
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	t.Cleanup(cancel)
	return ctx
}

// t0 is the creation time of the first job of a test; later jobs are a
// millisecond apart.
var t0 = time.Date(2031, 5, 6, 7, 8, 9, 0, time.UTC)

func newJob(id string, i int) *jobs.Job {
	at := t0.Add(time.Duration(i) * time.Millisecond)
	return &jobs.Job{
		ID: id, State: jobs.StateQueued, Priority: jobs.PriorityNormal,
		Query:  infer.Query{Model: "m", Method: "likelihood-weighting"},
		Model:  jobs.ModelInfo{Name: "m", Version: 1, Hash: "h"},
		Method: "likelihood-weighting", Seed: 7, BlockSize: 8, Blocks: 100,
		CreatedAt: at, UpdatedAt: at, Retention: time.Hour,
	}
}

func mustCreate(t *testing.T, s jobs.Store, j *jobs.Job) *jobs.Job {
	t.Helper()
	got, created, err := s.CreateJob(ctxFor(t), j, jobs.CreateLimits{})
	if err != nil || !created {
		t.Fatalf("CreateJob(%s) = created %v, %v; want created", j.ID, created, err)
	}
	return got
}

func finish(t *testing.T, s jobs.Store, id string, st jobs.State) {
	t.Helper()
	_, err := s.UpdateJob(ctxFor(t), id, func(j *jobs.Job) error {
		j.State = st
		j.FinishedAt = t0.Add(time.Hour)
		return nil
	})
	if err != nil {
		t.Fatalf("finish %s: %v", id, err)
	}
}

func claim(t *testing.T, s jobs.Store, id, worker string, limit int64, lease time.Duration) int64 {
	t.Helper()
	b, err := s.ClaimBlock(ctxFor(t), id, worker, limit, lease)
	if err != nil {
		t.Fatalf("ClaimBlock(%s, %s, %d): %v", id, worker, limit, err)
	}
	return b
}

func payload(k int64, tag string) []byte {
	return []byte(fmt.Sprintf(`{"block":%d,"by":%q}`, k, tag))
}

func statsOf(t *testing.T, s jobs.Store, id string, from int64, max int) [][]byte {
	t.Helper()
	got, err := s.BlockStats(ctxFor(t), id, from, max)
	if err != nil {
		t.Fatalf("BlockStats(%s, %d, %d): %v", id, from, max, err)
	}
	return got
}

func wantStats(t *testing.T, got [][]byte, want ...[]byte) {
	t.Helper()
	if len(got) != len(want) {
		t.Fatalf("BlockStats returned %d blocks %q; want %d %q", len(got), got, len(want), want)
	}
	for i := range want {
		if !bytes.Equal(got[i], want[i]) {
			t.Fatalf("BlockStats[%d] = %s; want %s", i, got[i], want[i])
		}
	}
}

func testPing(t *testing.T, s jobs.Store) {
	if err := s.Ping(ctxFor(t)); err != nil {
		t.Fatalf("Ping: %v", err)
	}
}

func testModelVersions(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	put := func(hash string, doc string, wantVersion int, wantCreated bool) jobs.ModelInfo {
		t.Helper()
		info := jobs.ModelInfo{Name: "alpha", Hash: hash, Variables: 3, Bytes: len(doc)}
		got, created, err := s.PutModel(ctx, info, []byte(doc))
		if err != nil {
			t.Fatalf("PutModel(%s): %v", hash, err)
		}
		if got.Version != wantVersion || created != wantCreated {
			t.Fatalf("PutModel(%s) = version %d created %v; want version %d created %v", hash, got.Version, created, wantVersion, wantCreated)
		}
		if got.Name != "alpha" || got.Hash != hash || got.Variables != 3 || got.CreatedAt.IsZero() {
			t.Fatalf("PutModel(%s) returned %+v", hash, got)
		}
		return got
	}
	put("h1", `{"v":1}`, 1, true)
	put("h1", `{"v": 1}`, 1, false) // same content hash as the latest: no new version
	put("h2", `{"v":2}`, 2, true)
	put("h1", `{"v":1}`, 3, true) // h1 is not the latest any more: a new version
	for _, c := range []struct {
		version int
		want    int
		doc     string
	}{{0, 3, `{"v":1}`}, {1, 1, `{"v":1}`}, {2, 2, `{"v":2}`}, {3, 3, `{"v":1}`}} {
		info, doc, err := s.GetModel(ctx, "alpha", c.version)
		if err != nil || info.Version != c.want || string(doc) != c.doc {
			t.Fatalf("GetModel(alpha, %d) = v%d %s, %v; want v%d %s", c.version, info.Version, doc, err, c.want, c.doc)
		}
		doc[0] = 'X' // the store must not share the slice
	}
	if _, doc, _ := s.GetModel(ctx, "alpha", 1); string(doc) != `{"v":1}` {
		t.Fatalf("a returned document changed the stored one: %s", doc)
	}
	if _, _, err := s.GetModel(ctx, "alpha", 9); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("GetModel(alpha, 9) error = %v; want ErrNotFound", err)
	}
	if _, _, err := s.GetModel(ctx, "nosuch", 0); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("GetModel(nosuch) error = %v; want ErrNotFound", err)
	}
}

func testModelList(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	for i, name := range []string{"gamma", "alpha", "delta", "beta", "alpha"} {
		if _, _, err := s.PutModel(ctx, jobs.ModelInfo{Name: name, Hash: fmt.Sprint("h", i)}, []byte("{}")); err != nil {
			t.Fatal(err)
		}
	}
	pages := [][]string{}
	after := ""
	for range 5 {
		infos, err := s.ListModels(ctx, after, 2)
		if err != nil {
			t.Fatal(err)
		}
		if len(infos) == 0 {
			break
		}
		var names []string
		for _, in := range infos {
			names = append(names, in.Name)
			if in.Name == "alpha" && in.Version != 2 {
				t.Fatalf("ListModels gives alpha version %d; want the latest, 2", in.Version)
			}
		}
		pages = append(pages, names)
		after = infos[len(infos)-1].Name
	}
	want := [][]string{{"alpha", "beta"}, {"delta", "gamma"}}
	if fmt.Sprint(pages) != fmt.Sprint(want) {
		t.Fatalf("ListModels pages = %v; want %v", pages, want)
	}
}

func testModelDelete(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	for _, h := range []string{"h1", "h2"} {
		if _, _, err := s.PutModel(ctx, jobs.ModelInfo{Name: "alpha", Hash: h}, []byte("{}")); err != nil {
			t.Fatal(err)
		}
	}
	if _, _, err := s.PutModel(ctx, jobs.ModelInfo{Name: "beta", Hash: "h"}, []byte("{}")); err != nil {
		t.Fatal(err)
	}
	if err := s.DeleteModel(ctx, "alpha"); err != nil {
		t.Fatalf("DeleteModel: %v", err)
	}
	for _, v := range []int{0, 1, 2} {
		if _, _, err := s.GetModel(ctx, "alpha", v); !errors.Is(err, jobs.ErrNotFound) {
			t.Fatalf("GetModel(alpha, %d) after delete: %v; want ErrNotFound", v, err)
		}
	}
	infos, err := s.ListModels(ctx, "", 10)
	if err != nil || len(infos) != 1 || infos[0].Name != "beta" {
		t.Fatalf("ListModels after delete = %+v, %v; want beta only", infos, err)
	}
	if err := s.DeleteModel(ctx, "alpha"); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("second DeleteModel error = %v; want ErrNotFound", err)
	}
}

func testJobRoundTrip(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	seed := uint64(1<<53 - 1)
	j := newJob("j-round", 0)
	j.Priority = jobs.PriorityHigh
	j.Query = infer.Query{Model: "m@2", Evidence: map[string]string{"a": "yes"}, SoftEvidence: map[string][]float64{"b": {0.25, 1}},
		Targets: []string{"c"}, Method: "rejection", MPE: true, Seed: &seed, Stop: infer.StopRule{MaxSamples: 99, Timeout: "3s"}}
	j.Stop = sampling.Stop{MaxSamples: 99, Timeout: 3 * time.Second, Confidence: 0.95}
	// Values whose decimal forms are long or extreme must come back exactly.
	j.Merged = &sampling.Stats{Blocks: 2, N: 16, Accepted: 3, SumW: 0.1 + 0.2, SumW2: 1e-300, MaxW: 1.0 / 3, StateW: []float64{2.0 / 3, 5e-324}, StateW2: []float64{0, 1e308}}
	j.MergedBlocks = 2
	j.Result = &infer.Result{Method: "rejection", Seed: seed, Samples: 16, StopReason: "", Confidence: 0.95,
		Marginals: map[string]map[string]sampling.Interval{"c": {"no": {P: 0.7, Lo: 0.1 + 0.2, Hi: 0.9}}}, Caution: "c"}
	j.StartedAt = t0.Add(time.Second)
	j.Deadline = t0.Add(time.Minute)
	stored := mustCreate(t, s, j)
	got, err := s.GetJob(ctx, j.ID)
	if err != nil {
		t.Fatal(err)
	}
	want, _ := json.Marshal(j)
	for _, g := range []*jobs.Job{stored, got} {
		b, _ := json.Marshal(g)
		if !bytes.Equal(b, want) {
			t.Fatalf("job read back differs:\n got %s\nwant %s", b, want)
		}
	}
	// The record is a copy: changing it changes nothing stored.
	got.Merged.StateW[0] = 42
	got.Query.Evidence["a"] = "no"
	again, _ := s.GetJob(ctx, j.ID)
	if again.Merged.StateW[0] != 2.0/3 || again.Query.Evidence["a"] != "yes" {
		t.Fatalf("changing a returned job changed the stored record")
	}
	// CreateJob stores a new job as queued whatever its state field says.
	k := newJob("j-running", 1)
	k.State = jobs.StateRunning
	if got := mustCreate(t, s, k); got.State != jobs.StateQueued {
		t.Fatalf("CreateJob stored state %q; want queued", got.State)
	}
}

func testJobNotFound(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	if _, err := s.GetJob(ctx, "nosuch"); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("GetJob: %v; want ErrNotFound", err)
	}
	if _, err := s.UpdateJob(ctx, "nosuch", func(*jobs.Job) error { return nil }); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("UpdateJob: %v; want ErrNotFound", err)
	}
	if _, err := s.ClaimBlock(ctx, "nosuch", "w", 1, longLease); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("ClaimBlock: %v; want ErrNotFound", err)
	}
}

func testJobList(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	for i := range 5 {
		mustCreate(t, s, newJob(fmt.Sprint("j", i), i))
	}
	var pages [][]string
	after := ""
	for range 5 {
		js, err := s.ListJobs(ctx, "", after, 2)
		if err != nil {
			t.Fatal(err)
		}
		if len(js) == 0 {
			break
		}
		var ids []string
		for _, j := range js {
			ids = append(ids, j.ID)
		}
		pages = append(pages, ids)
		after = js[len(js)-1].ID
	}
	want := [][]string{{"j4", "j3"}, {"j2", "j1"}, {"j0"}}
	if fmt.Sprint(pages) != fmt.Sprint(want) {
		t.Fatalf("ListJobs pages = %v; want %v", pages, want)
	}
}

func testIdempotency(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	a := newJob("j-a", 0)
	a.IdempotencyKey = "key-1"
	mustCreate(t, s, a)
	b := newJob("j-b", 1)
	b.IdempotencyKey = "key-1"
	got, created, err := s.CreateJob(ctx, b, jobs.CreateLimits{})
	if err != nil || created || got.ID != "j-a" {
		t.Fatalf("CreateJob with a used key = %v created %v, %v; want j-a, not created", got, created, err)
	}
	if _, err := s.GetJob(ctx, "j-b"); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("the duplicate was stored: %v", err)
	}
	// A retried submission finds its job even when the queue is full.
	got, created, err = s.CreateJob(ctx, b, jobs.CreateLimits{MaxUnfinished: 1, TenantMaxUnfinished: 1})
	if err != nil || created || got.ID != "j-a" {
		t.Fatalf("CreateJob with a used key on a full queue = %v created %v, %v; want j-a", got, created, err)
	}
	// A finished job still kept still owns its key.
	finish(t, s, "j-a", jobs.StateSucceeded)
	got, created, err = s.CreateJob(ctx, b, jobs.CreateLimits{})
	if err != nil || created || got.ID != "j-a" || got.State != jobs.StateSucceeded {
		t.Fatalf("CreateJob with the key of a finished job = %v created %v, %v; want j-a", got, created, err)
	}
	c := newJob("j-c", 2)
	c.IdempotencyKey = "key-2"
	mustCreate(t, s, c)
}

func testQueueFull(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	for i := range 2 {
		if _, created, err := s.CreateJob(ctx, newJob(fmt.Sprint("j", i), i), jobs.CreateLimits{MaxUnfinished: 2}); err != nil || !created {
			t.Fatalf("CreateJob %d: %v", i, err)
		}
	}
	if _, _, err := s.CreateJob(ctx, newJob("j2", 2), jobs.CreateLimits{MaxUnfinished: 2}); !errors.Is(err, jobs.ErrQueueFull) {
		t.Fatalf("third CreateJob at capacity 2: %v; want ErrQueueFull", err)
	}
	if _, err := s.GetJob(ctx, "j2"); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("a refused job was stored: %v", err)
	}
	if q, r, err := s.Unfinished(ctx); err != nil || q != 2 || r != 0 {
		t.Fatalf("Unfinished = %d, %d, %v; want 2, 0", q, r, err)
	}
	if _, err := s.UpdateJob(ctx, "j0", func(j *jobs.Job) error { j.State = jobs.StateRunning; return nil }); err != nil {
		t.Fatal(err)
	}
	if q, r, err := s.Unfinished(ctx); err != nil || q != 1 || r != 1 {
		t.Fatalf("Unfinished = %d, %d, %v; want 1, 1", q, r, err)
	}
	finish(t, s, "j0", jobs.StateSucceeded)
	if q, r, err := s.Unfinished(ctx); err != nil || q != 1 || r != 0 {
		t.Fatalf("Unfinished = %d, %d, %v; want 1, 0", q, r, err)
	}
	if _, created, err := s.CreateJob(ctx, newJob("j2", 2), jobs.CreateLimits{MaxUnfinished: 2}); err != nil || !created {
		t.Fatalf("CreateJob after a job finished: %v; want room", err)
	}
}

func testUpdateAtomic(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	mustCreate(t, s, newJob("j", 0))
	const goroutines, each = 8, 25
	var wg sync.WaitGroup
	errs := make(chan error, goroutines)
	for g := range goroutines {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for range each {
				_, err := s.UpdateJob(ctx, "j", func(j *jobs.Job) error {
					j.MergedBlocks++
					if j.Merged == nil {
						j.Merged = &sampling.Stats{StateW: []float64{0}}
					}
					j.Merged.N += int64(g + 1)
					return nil
				})
				if err != nil {
					errs <- err
					return
				}
			}
		}()
	}
	wg.Wait()
	close(errs)
	for err := range errs {
		t.Fatalf("UpdateJob: %v", err)
	}
	j, err := s.GetJob(ctx, "j")
	if err != nil {
		t.Fatal(err)
	}
	// Every update applied once: 200 increments, and N = each * (1+...+8).
	if j.MergedBlocks != goroutines*each || j.Merged.N != each*goroutines*(goroutines+1)/2 {
		t.Fatalf("after %d concurrent updates: merged_blocks %d, n %d; want %d, %d (an update was lost)",
			goroutines*each, j.MergedBlocks, j.Merged.N, goroutines*each, each*goroutines*(goroutines+1)/2)
	}
}

func testUpdateError(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	mustCreate(t, s, newJob("j", 0))
	boom := errors.New("boom")
	_, err := s.UpdateJob(ctx, "j", func(j *jobs.Job) error {
		j.MergedBlocks = 99
		j.State = jobs.StateFailed
		return boom
	})
	if !errors.Is(err, boom) {
		t.Fatalf("UpdateJob error = %v; want the function's error", err)
	}
	j, _ := s.GetJob(ctx, "j")
	if j.MergedBlocks != 0 || j.State != jobs.StateQueued {
		t.Fatalf("a failed update was stored: merged_blocks %d, state %s", j.MergedBlocks, j.State)
	}
	got, err := s.UpdateJob(ctx, "j", func(j *jobs.Job) error { j.MergedBlocks = 5; return nil })
	if err != nil || got.MergedBlocks != 5 {
		t.Fatalf("UpdateJob returned %v, %v; want the stored record with merged_blocks 5", got, err)
	}
}

func testClaimOnce(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	const blocks, workers = 200, 6
	mustCreate(t, s, newJob("j", 0))
	var mu sync.Mutex
	seen := map[int64]string{}
	var dup []string
	var wg sync.WaitGroup
	errs := make(chan error, workers)
	for w := range workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			name := fmt.Sprint("w", w)
			for {
				b, err := s.ClaimBlock(ctx, "j", name, blocks, longLease)
				if err != nil {
					errs <- err
					return
				}
				if b < 0 {
					return
				}
				mu.Lock()
				if prev, ok := seen[b]; ok {
					dup = append(dup, fmt.Sprintf("block %d to %s and %s", b, prev, name))
				}
				seen[b] = name
				mu.Unlock()
				if err := s.CommitBlock(ctx, "j", b, name, payload(b, name)); err != nil {
					errs <- err
					return
				}
			}
		}()
	}
	wg.Wait()
	close(errs)
	for err := range errs {
		t.Fatal(err)
	}
	if len(dup) > 0 {
		t.Fatalf("blocks handed out twice: %v", dup)
	}
	for b := int64(0); b < blocks; b++ {
		if _, ok := seen[b]; !ok {
			t.Fatalf("block %d never handed out (%d of %d were)", b, len(seen), blocks)
		}
	}
	if len(seen) != blocks {
		t.Fatalf("%d blocks handed out; want %d", len(seen), blocks)
	}
	if got := statsOf(t, s, "j", 0, blocks+10); len(got) != blocks {
		t.Fatalf("BlockStats found %d committed blocks; want %d", len(got), blocks)
	}
}

func testClaimLimit(t *testing.T, s jobs.Store) {
	mustCreate(t, s, newJob("j", 0))
	var got []int64
	for range 4 {
		got = append(got, claim(t, s, "j", "w", 3, longLease))
	}
	if fmt.Sprint(got) != "[0 1 2 -1]" {
		t.Fatalf("claims with limit 3 = %v; want [0 1 2 -1]", got)
	}
	got = got[:0]
	for range 3 {
		got = append(got, claim(t, s, "j", "w", 5, longLease))
	}
	if fmt.Sprint(got) != "[3 4 -1]" {
		t.Fatalf("claims with limit 5 = %v; want [3 4 -1]", got)
	}
}

func testLeaseExpiry(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	mustCreate(t, s, newJob("j", 0))
	if b := claim(t, s, "j", "w1", 1, shortLease); b != 0 {
		t.Fatalf("first claim = %d; want 0", b)
	}
	if b := claim(t, s, "j", "w2", 1, longLease); b != -1 {
		t.Fatalf("claim of a leased block = %d; want -1", b)
	}
	Eventually(t, waitBound, "an expired lease is claimed again", func() bool {
		return claim(t, s, "j", "w2", 1, longLease) == 0
	})
	if err := s.ExtendLease(ctx, "j", 0, "w1", longLease); !errors.Is(err, jobs.ErrLeaseLost) {
		t.Fatalf("ExtendLease by the old holder: %v; want ErrLeaseLost", err)
	}
	if err := s.CommitBlock(ctx, "j", 0, "w1", payload(0, "w1")); !errors.Is(err, jobs.ErrLeaseLost) {
		t.Fatalf("CommitBlock by the old holder: %v; want ErrLeaseLost", err)
	}
	wantStats(t, statsOf(t, s, "j", 0, 5))
	if err := s.CommitBlock(ctx, "j", 0, "w2", payload(0, "w2")); err != nil {
		t.Fatalf("CommitBlock by the new holder: %v", err)
	}
	wantStats(t, statsOf(t, s, "j", 0, 5), payload(0, "w2"))
	// The old holder's late commit of a committed block changes nothing.
	if err := s.CommitBlock(ctx, "j", 0, "w1", payload(0, "w1")); err != nil {
		t.Fatalf("late CommitBlock of a committed block: %v; want nil (idempotent)", err)
	}
	wantStats(t, statsOf(t, s, "j", 0, 5), payload(0, "w2"))
	if b := claim(t, s, "j", "w3", 1, longLease); b != -1 {
		t.Fatalf("claim of a committed block = %d; want -1", b)
	}
}

func testExtendLease(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	mustCreate(t, s, newJob("j", 0))
	const lease = time.Second
	if b := claim(t, s, "j", "w1", 1, lease); b != 0 {
		t.Fatalf("claim = %d; want 0", b)
	}
	// Renewed every 100ms for 1.5 leases, the block stays with w1.
	for range 15 {
		time.Sleep(lease / 10)
		if err := s.ExtendLease(ctx, "j", 0, "w1", lease); err != nil {
			t.Fatalf("ExtendLease: %v", err)
		}
		if b := claim(t, s, "j", "w2", 1, lease); b != -1 {
			t.Fatalf("a renewed block was claimed by another worker (%d)", b)
		}
	}
	if err := s.ExtendLease(ctx, "j", 0, "w2", lease); !errors.Is(err, jobs.ErrLeaseLost) {
		t.Fatalf("ExtendLease by a worker without the lease: %v; want ErrLeaseLost", err)
	}
	if err := s.ExtendLease(ctx, "j", 5, "w1", lease); !errors.Is(err, jobs.ErrLeaseLost) {
		t.Fatalf("ExtendLease of a block never claimed: %v; want ErrLeaseLost", err)
	}
}

func testDoubleCommit(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	mustCreate(t, s, newJob("j", 0))
	claim(t, s, "j", "w1", 1, longLease)
	if err := s.CommitBlock(ctx, "j", 0, "w1", payload(0, "first")); err != nil {
		t.Fatal(err)
	}
	if err := s.CommitBlock(ctx, "j", 0, "w1", payload(0, "second")); err != nil {
		t.Fatalf("second CommitBlock: %v; want nil (idempotent)", err)
	}
	wantStats(t, statsOf(t, s, "j", 0, 5), payload(0, "first"))
	if err := s.ExtendLease(ctx, "j", 0, "w1", longLease); !errors.Is(err, jobs.ErrLeaseLost) {
		t.Fatalf("ExtendLease after commit: %v; want ErrLeaseLost (the commit drops the lease)", err)
	}
}

func testRelease(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	mustCreate(t, s, newJob("j", 0))
	claim(t, s, "j", "w1", 1, longLease)
	if err := s.ReleaseBlock(ctx, "j", 0, "w2"); !errors.Is(err, jobs.ErrLeaseLost) {
		t.Fatalf("ReleaseBlock by a worker without the lease: %v; want ErrLeaseLost", err)
	}
	if b := claim(t, s, "j", "w2", 1, longLease); b != -1 {
		t.Fatalf("claim after a refused release = %d; want -1", b)
	}
	if err := s.ReleaseBlock(ctx, "j", 0, "w1"); err != nil {
		t.Fatalf("ReleaseBlock: %v", err)
	}
	if err := s.ExtendLease(ctx, "j", 0, "w1", longLease); !errors.Is(err, jobs.ErrLeaseLost) {
		t.Fatalf("ExtendLease after release: %v; want ErrLeaseLost", err)
	}
	// A released block is claimable at once, below any limit.
	if b := claim(t, s, "j", "w2", 1, longLease); b != 0 {
		t.Fatalf("claim after release = %d; want 0 at once", b)
	}
	if err := s.CommitBlock(ctx, "j", 0, "w1", payload(0, "w1")); !errors.Is(err, jobs.ErrLeaseLost) {
		t.Fatalf("CommitBlock by the releaser: %v; want ErrLeaseLost", err)
	}
	if err := s.CommitBlock(ctx, "j", 0, "w2", payload(0, "w2")); err != nil {
		t.Fatal(err)
	}
	wantStats(t, statsOf(t, s, "j", 0, 5), payload(0, "w2"))
}

func commitBlocks(t *testing.T, s jobs.Store, id string, blocks ...int64) {
	t.Helper()
	for _, b := range blocks {
		if err := s.CommitBlock(ctxFor(t), id, b, "w", payload(b, "w")); err != nil {
			t.Fatalf("CommitBlock(%d): %v", b, err)
		}
	}
}

func testBlockStatsGap(t *testing.T, s jobs.Store) {
	mustCreate(t, s, newJob("j", 0))
	for range 4 {
		claim(t, s, "j", "w", 4, longLease)
	}
	commitBlocks(t, s, "j", 0, 1, 3)
	wantStats(t, statsOf(t, s, "j", 0, 10), payload(0, "w"), payload(1, "w"))
	wantStats(t, statsOf(t, s, "j", 0, 1), payload(0, "w"))
	wantStats(t, statsOf(t, s, "j", 1, 10), payload(1, "w"))
	wantStats(t, statsOf(t, s, "j", 2, 10))
	wantStats(t, statsOf(t, s, "j", 3, 10), payload(3, "w"))
	commitBlocks(t, s, "j", 2)
	wantStats(t, statsOf(t, s, "j", 0, 10), payload(0, "w"), payload(1, "w"), payload(2, "w"), payload(3, "w"))
	wantStats(t, statsOf(t, s, "j", 1, 2), payload(1, "w"), payload(2, "w"))
}

func testDropBlocks(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	mustCreate(t, s, newJob("j", 0))
	for range 4 {
		claim(t, s, "j", "w", 4, longLease)
	}
	commitBlocks(t, s, "j", 0, 1, 2, 3)
	if err := s.DropBlocks(ctx, "j", 2); err != nil {
		t.Fatal(err)
	}
	wantStats(t, statsOf(t, s, "j", 0, 10))
	wantStats(t, statsOf(t, s, "j", 2, 10), payload(2, "w"), payload(3, "w"))
	// Dropped blocks are never handed out again.
	if b := claim(t, s, "j", "w", 10, longLease); b != 4 {
		t.Fatalf("claim after DropBlocks = %d; want 4, the next new block", b)
	}
	if err := s.DropBlocks(ctx, "j", -1); err != nil {
		t.Fatal(err)
	}
	wantStats(t, statsOf(t, s, "j", 2, 10))
	// DropBlocks(-1) drops leases too: the holder of block 4 commits nothing.
	if err := s.CommitBlock(ctx, "j", 4, "w", payload(4, "w")); !errors.Is(err, jobs.ErrLeaseLost) {
		t.Fatalf("CommitBlock after DropBlocks(-1): %v; want ErrLeaseLost", err)
	}
	wantStats(t, statsOf(t, s, "j", 4, 10))
}

func testTerminal(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	for i, id := range []string{"a", "b", "c", "d"} {
		mustCreate(t, s, newJob(id, i))
	}
	finish(t, s, "a", jobs.StateCancelled)
	finish(t, s, "b", jobs.StateSucceeded)
	finish(t, s, "c", jobs.StateFailed)
	for _, id := range []string{"a", "b", "c"} {
		if b := claim(t, s, id, "w", 10, longLease); b != -1 {
			t.Fatalf("claim on finished job %s = %d; want -1", id, b)
		}
	}
	cl, err := s.ClaimableJobs(ctx, 10)
	if err != nil || fmt.Sprint(idsOf(cl)) != "[d]" {
		t.Fatalf("ClaimableJobs = %v, %v; want [d]", cl, err)
	}
	if q, r, err := s.Unfinished(ctx); err != nil || q != 1 || r != 0 {
		t.Fatalf("Unfinished = %d, %d, %v; want 1, 0", q, r, err)
	}
}

func testRetention(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	done := newJob("done", 0)
	done.Retention = shortRetains
	done.IdempotencyKey = "k"
	mustCreate(t, s, done)
	open := newJob("open", 1)
	open.Retention = shortRetains
	mustCreate(t, s, open)
	finish(t, s, "done", jobs.StateSucceeded)
	if _, err := s.GetJob(ctx, "done"); err != nil {
		t.Fatalf("a finished job vanished before its retention: %v", err)
	}
	Eventually(t, waitBound, "a finished job expires after its retention", func() bool {
		_, err := s.GetJob(ctx, "done")
		return errors.Is(err, jobs.ErrNotFound)
	})
	if _, err := s.GetJob(ctx, "open"); err != nil {
		t.Fatalf("an unfinished job expired: %v", err)
	}
	again := newJob("again", 2)
	again.IdempotencyKey = "k"
	if _, created, err := s.CreateJob(ctx, again, jobs.CreateLimits{}); err != nil || !created {
		t.Fatalf("the key of an expired job still refers to it: created %v, %v", created, err)
	}
}

// drain empties a signal channel and counts what it held.
func drain(ch <-chan struct{}) int {
	n := 0
	for {
		select {
		case <-ch:
			n++
		default:
			return n
		}
	}
}

func testNotify(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	a, cancelA, err := s.Subscribe(ctx, "t1")
	if err != nil {
		t.Fatal(err)
	}
	defer cancelA()
	a2, cancelA2, err := s.Subscribe(ctx, "t1")
	if err != nil {
		t.Fatal(err)
	}
	defer cancelA2()
	b, cancelB, err := s.Subscribe(ctx, "t2")
	if err != nil {
		t.Fatal(err)
	}
	defer cancelB()
	if cap(a) != 1 {
		t.Fatalf("subscription channel capacity %d; want 1 (one pending signal at most)", cap(a))
	}
	for range 5 {
		if err := s.Notify(ctx, "t1"); err != nil {
			t.Fatal(err)
		}
	}
	Eventually(t, waitBound, "both subscribers of t1 are signalled", func() bool { return len(a) == 1 && len(a2) == 1 })
	time.Sleep(settle)
	if n := drain(a); n != 1 {
		t.Fatalf("five notifications left %d pending signals; want 1 (coalesced)", n)
	}
	if n := drain(b); n != 0 {
		t.Fatalf("a subscriber of t2 got %d signals for t1", n)
	}
	drain(a2)
	// After the signal was read, a new change signals again.
	if err := s.Notify(ctx, "t1"); err != nil {
		t.Fatal(err)
	}
	Eventually(t, waitBound, "a later notification is delivered", func() bool { return len(a) == 1 })
}

func testSubscribeEnds(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	a, cancelA, err := s.Subscribe(ctx, "t")
	if err != nil {
		t.Fatal(err)
	}
	subCtx, endSub := context.WithCancel(ctx)
	b, cancelB, err := s.Subscribe(subCtx, "t")
	if err != nil {
		t.Fatal(err)
	}
	defer cancelB()
	watch, cancelW, err := s.Subscribe(ctx, "t")
	if err != nil {
		t.Fatal(err)
	}
	defer cancelW()
	cancelA()
	endSub()
	time.Sleep(settle) // let the backend see the ended subscriptions
	if err := s.Notify(ctx, "t"); err != nil {
		t.Fatal(err)
	}
	Eventually(t, waitBound, "a live subscriber is signalled", func() bool { return len(watch) == 1 })
	time.Sleep(settle)
	if len(a) != 0 || len(b) != 0 {
		t.Fatalf("ended subscriptions still received signals (cancelled %d, ctx ended %d)", len(a), len(b))
	}
	cancelA() // a second cancel is harmless
}

func testPriorityOrder(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	prios := []jobs.Priority{jobs.PriorityLow, jobs.PriorityHigh, jobs.PriorityNormal, jobs.PriorityHigh, jobs.PriorityNormal, jobs.PriorityHigh}
	for i, p := range prios {
		j := newJob(fmt.Sprint("j", i), i)
		j.Priority = p
		mustCreate(t, s, j)
	}
	finish(t, s, "j5", jobs.StateSucceeded)
	cl, err := s.ClaimableJobs(ctx, 10)
	if err != nil {
		t.Fatal(err)
	}
	want := []string{"j1", "j3", "j2", "j4", "j0"}
	if fmt.Sprint(idsOf(cl)) != fmt.Sprint(want) {
		t.Fatalf("ClaimableJobs = %v; want %v (high first, oldest first within a priority)", cl, want)
	}
	wantPrio := []jobs.Priority{jobs.PriorityHigh, jobs.PriorityHigh, jobs.PriorityNormal, jobs.PriorityNormal, jobs.PriorityLow}
	for i, c := range cl {
		if c.Priority != wantPrio[i] || c.Tenant != "" {
			t.Fatalf("ClaimableJobs[%d] = %+v; want priority %v of the open tenant", i, c, wantPrio[i])
		}
	}
	cl, err = s.ClaimableJobs(ctx, 2)
	if err != nil || fmt.Sprint(idsOf(cl)) != fmt.Sprint(want[:2]) {
		t.Fatalf("ClaimableJobs(limit 2) = %v, %v; want %v", cl, err, want[:2])
	}
}

func idsOf(cl []jobs.Claimable) []string {
	ids := make([]string, len(cl))
	for i, c := range cl {
		ids[i] = c.ID
	}
	return ids
}

// tenantJob is newJob owned by tenant.
func tenantJob(tenant, id string, i int) *jobs.Job {
	j := newJob(id, i)
	j.Tenant = tenant
	return j
}

// listPages pages through ListJobs(tenant) two at a time.
func listPages(t *testing.T, s jobs.Store, tenant string) [][]string {
	t.Helper()
	var pages [][]string
	after := ""
	for range 10 {
		js, err := s.ListJobs(ctxFor(t), tenant, after, 2)
		if err != nil {
			t.Fatalf("ListJobs(%q): %v", tenant, err)
		}
		if len(js) == 0 {
			break
		}
		var ids []string
		for _, j := range js {
			if tenant != jobs.AllTenants && j.Tenant != tenant {
				t.Fatalf("ListJobs(%q) returned job %s of tenant %q", tenant, j.ID, j.Tenant)
			}
			ids = append(ids, j.ID)
		}
		pages = append(pages, ids)
		after = js[len(js)-1].ID
	}
	return pages
}

func testTenantListing(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	owners := []string{"acme", "", "birch", "acme", "acme", "", "birch", "acme"}
	for i, tn := range owners {
		mustCreate(t, s, tenantJob(tn, fmt.Sprint("j", i), i))
	}
	for _, c := range []struct {
		tenant string
		want   string
	}{
		{"acme", "[[j7 j4] [j3 j0]]"},
		{"", "[[j5 j1]]"},
		{"birch", "[[j6 j2]]"},
		{"nobody", "[]"},
		{jobs.AllTenants, "[[j7 j6] [j5 j4] [j3 j2] [j1 j0]]"},
	} {
		if got := fmt.Sprint(listPages(t, s, c.tenant)); got != c.want {
			t.Fatalf("ListJobs(%q) pages = %s; want %s", c.tenant, got, c.want)
		}
	}
	// A page token of another tenant's job opens nothing of that tenant.
	js, err := s.ListJobs(ctx, "birch", "j4", 10)
	if err != nil || len(js) != 0 {
		t.Fatalf("ListJobs(birch, after acme's j4) = %d jobs, %v; want none", len(js), err)
	}
	// Finished jobs stay listed; an expired one leaves every listing.
	finish(t, s, "j4", jobs.StateSucceeded)
	if got := fmt.Sprint(listPages(t, s, "acme")); got != "[[j7 j4] [j3 j0]]" {
		t.Fatalf("ListJobs(acme) after j4 finished = %s", got)
	}
	if _, _, err := s.CreateJob(ctx, tenantJob(jobs.AllTenants, "jx", 9), jobs.CreateLimits{}); err == nil {
		t.Fatalf("CreateJob for tenant %q succeeded; want an error (it stands for all tenants)", jobs.AllTenants)
	}
}

func testTenantQuota(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	lim := jobs.CreateLimits{MaxUnfinished: 4, TenantMaxUnfinished: 2}
	create := func(tenant, id string, i int) error {
		t.Helper()
		_, created, err := s.CreateJob(ctx, tenantJob(tenant, id, i), lim)
		if err == nil && !created {
			t.Fatalf("CreateJob(%s) did not create", id)
		}
		return err
	}
	for i, id := range []string{"a0", "a1"} {
		if err := create("acme", id, i); err != nil {
			t.Fatalf("CreateJob(%s) within acme's quota: %v", id, err)
		}
	}
	err := create("acme", "a2", 2)
	if !errors.Is(err, jobs.ErrQuotaExceeded) || errors.Is(err, jobs.ErrQueueFull) {
		t.Fatalf("acme's third unfinished job with a quota of 2: %v; want ErrQuotaExceeded", err)
	}
	// The message names the quota and its value.
	if msg := err.Error(); !strings.Contains(msg, "max_unfinished") || !strings.Contains(msg, "2") || !strings.Contains(msg, "acme") {
		t.Fatalf("quota error %q does not name the quota, its value and the tenant", msg)
	}
	if _, err := s.GetJob(ctx, "a2"); !errors.Is(err, jobs.ErrNotFound) {
		t.Fatalf("a job refused by the quota was stored: %v", err)
	}
	// Other tenants have quotas of their own.
	for i, id := range []string{"b0", "b1"} {
		if err := create("birch", id, 3+i); err != nil {
			t.Fatalf("CreateJob(%s) of birch while acme is at its quota: %v", id, err)
		}
	}
	// All tenants together are at MaxUnfinished: the queue is full.
	if err := create("", "o0", 5); !errors.Is(err, jobs.ErrQueueFull) {
		t.Fatalf("fifth unfinished job with MaxUnfinished 4: %v; want ErrQueueFull", err)
	}
	for _, c := range []struct {
		tenant        string
		queued, runng int
	}{{"acme", 2, 0}, {"birch", 2, 0}, {"", 0, 0}, {"nobody", 0, 0}, {jobs.AllTenants, 4, 0}} {
		q, r, err := s.UnfinishedOf(ctx, c.tenant)
		if err != nil || q != c.queued || r != c.runng {
			t.Fatalf("UnfinishedOf(%q) = %d, %d, %v; want %d, %d", c.tenant, q, r, err, c.queued, c.runng)
		}
	}
	if _, err := s.UpdateJob(ctx, "a0", func(j *jobs.Job) error { j.State = jobs.StateRunning; return nil }); err != nil {
		t.Fatal(err)
	}
	if q, r, err := s.UnfinishedOf(ctx, "acme"); err != nil || q != 1 || r != 1 {
		t.Fatalf("UnfinishedOf(acme) with one running = %d, %d, %v; want 1, 1", q, r, err)
	}
	// A running job still counts; a finished one does not.
	if err := create("acme", "a2", 6); !errors.Is(err, jobs.ErrQuotaExceeded) {
		t.Fatalf("acme at its quota with a job running: %v; want ErrQuotaExceeded", err)
	}
	finish(t, s, "a0", jobs.StateCancelled)
	if err := create("acme", "a2", 7); err != nil {
		t.Fatalf("CreateJob after one of acme's jobs finished: %v; want room", err)
	}
	if q, r, err := s.Unfinished(ctx); err != nil || q != 4 || r != 0 {
		t.Fatalf("Unfinished = %d, %d, %v; want 4, 0", q, r, err)
	}
}

func testTenantIdempotency(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	a := tenantJob("acme", "ja", 0)
	a.IdempotencyKey = "nightly-report"
	mustCreate(t, s, a)
	// The same key in another tenant, and in the open tenant, makes new jobs.
	b := tenantJob("birch", "jb", 1)
	b.IdempotencyKey = "nightly-report"
	if got, created, err := s.CreateJob(ctx, b, jobs.CreateLimits{}); err != nil || !created || got.ID != "jb" || got.Tenant != "birch" {
		t.Fatalf("CreateJob with acme's key for birch = %+v created %v, %v; want a new job jb", got, created, err)
	}
	o := tenantJob("", "jo", 2)
	o.IdempotencyKey = "nightly-report"
	if _, created, err := s.CreateJob(ctx, o, jobs.CreateLimits{}); err != nil || !created {
		t.Fatalf("CreateJob with acme's key for the open tenant = created %v, %v; want a new job", created, err)
	}
	// Within a tenant the key still finds the tenant's own job.
	for _, c := range []struct{ tenant, id, want string }{{"acme", "ja2", "ja"}, {"birch", "jb2", "jb"}, {"", "jo2", "jo"}} {
		again := tenantJob(c.tenant, c.id, 3)
		again.IdempotencyKey = "nightly-report"
		got, created, err := s.CreateJob(ctx, again, jobs.CreateLimits{})
		if err != nil || created || got.ID != c.want {
			t.Fatalf("CreateJob(%q) with its used key = %v created %v, %v; want %s", c.tenant, got, created, err, c.want)
		}
	}
	// A key keeps finding its job when the tenant is at its quota.
	again := tenantJob("acme", "ja3", 4)
	again.IdempotencyKey = "nightly-report"
	if got, created, err := s.CreateJob(ctx, again, jobs.CreateLimits{TenantMaxUnfinished: 1}); err != nil || created || got.ID != "ja" {
		t.Fatalf("CreateJob with a used key at the tenant's quota = %v created %v, %v; want ja", got, created, err)
	}
}

func testTenantClaimable(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	jobsOf := []struct {
		tenant string
		prio   jobs.Priority
	}{
		{"birch", jobs.PriorityLow}, {"acme", jobs.PriorityNormal}, {"acme", jobs.PriorityHigh}, {"", jobs.PriorityNormal},
		{"acme", jobs.PriorityNormal}, {"birch", jobs.PriorityHigh}, {"acme", jobs.PriorityLow}, {"birch", jobs.PriorityNormal},
	}
	for i, c := range jobsOf {
		j := tenantJob(c.tenant, fmt.Sprint("j", i), i)
		j.Priority = c.prio
		mustCreate(t, s, j)
	}
	finish(t, s, "j7", jobs.StateFailed)
	format := func(cl []jobs.Claimable) string {
		var b strings.Builder
		for _, c := range cl {
			fmt.Fprintf(&b, "%s/%s/%s ", c.Tenant, c.ID, c.Priority)
		}
		return strings.TrimSpace(b.String())
	}
	cl, err := s.ClaimableJobs(ctx, 0)
	want := "/j3/normal acme/j2/high acme/j1/normal acme/j4/normal acme/j6/low birch/j5/high birch/j0/low"
	if err != nil || format(cl) != want {
		t.Fatalf("ClaimableJobs(all) = %s, %v;\nwant %s (tenants in name order, each by priority then age)", format(cl), err, want)
	}
	// The limit applies to each tenant, so that a tenant with a long
	// queue cannot hide the others' jobs.
	cl, err = s.ClaimableJobs(ctx, 2)
	want = "/j3/normal acme/j2/high acme/j1/normal birch/j5/high birch/j0/low"
	if err != nil || format(cl) != want {
		t.Fatalf("ClaimableJobs(2) = %s, %v;\nwant %s", format(cl), err, want)
	}
}

func testTenantFixed(t *testing.T, s jobs.Store) {
	ctx := ctxFor(t)
	mustCreate(t, s, tenantJob("acme", "j", 0))
	got, err := s.UpdateJob(ctx, "j", func(j *jobs.Job) error {
		j.Tenant = "birch"
		j.State = jobs.StateRunning
		return nil
	})
	if err != nil || got.Tenant != "acme" {
		t.Fatalf("UpdateJob moving the job to another tenant = %+v, %v; want the tenant kept", got, err)
	}
	if j, err := s.GetJob(ctx, "j"); err != nil || j.Tenant != "acme" || j.State != jobs.StateRunning {
		t.Fatalf("GetJob after the update = %+v, %v; want acme's running job", j, err)
	}
	if q, r, err := s.UnfinishedOf(ctx, "acme"); err != nil || q != 0 || r != 1 {
		t.Fatalf("UnfinishedOf(acme) = %d, %d, %v; want 0, 1", q, r, err)
	}
	if q, r, err := s.UnfinishedOf(ctx, "birch"); err != nil || q != 0 || r != 0 {
		t.Fatalf("UnfinishedOf(birch) = %d, %d, %v; want 0, 0", q, r, err)
	}
	if got := fmt.Sprint(listPages(t, s, "birch")); got != "[]" {
		t.Fatalf("ListJobs(birch) = %s; want none", got)
	}
}
