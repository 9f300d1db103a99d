package redisstore

import (
	"context"
	"errors"
	"fmt"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"

	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/jobstest"
	"github.com/beliefd/beliefd/worker/redisstore/redistest"
)

func testJob(id string) *jobs.Job {
	at := time.Date(2031, 5, 6, 7, 8, 9, 0, time.UTC)
	return &jobs.Job{
		ID: id, State: jobs.StateQueued, Priority: jobs.PriorityNormal,
		Method: "likelihood-weighting", Seed: 7, BlockSize: 8, Blocks: 100,
		CreatedAt: at, UpdatedAt: at, Retention: time.Hour,
	}
}

func create(t testing.TB, s *Store, j *jobs.Job) {
	t.Helper()
	if _, created, err := s.CreateJob(ctxFor(t), j, jobs.CreateLimits{}); err != nil || !created {
		t.Fatalf("CreateJob(%s) = created %v, %v", j.ID, created, err)
	}
}

func setState(t testing.TB, s *Store, id string, st jobs.State) {
	t.Helper()
	if _, err := s.UpdateJob(ctxFor(t), id, func(j *jobs.Job) error { j.State = st; return nil }); err != nil {
		t.Fatalf("UpdateJob(%s -> %s): %v", id, st, err)
	}
}

// hashTag returns the part of a key that Redis Cluster hashes: the text
// between the first '{' and the next '}' when that is not empty, else the
// whole key (Redis Cluster specification, "Hash tags").
func hashTag(key string) string {
	i := strings.IndexByte(key, '{')
	if i < 0 {
		return key
	}
	j := strings.IndexByte(key[i+1:], '}')
	if j <= 0 {
		return key
	}
	return key[i+1 : i+1+j]
}

func keysUnder(t testing.TB, s *Store) map[string]string {
	t.Helper()
	ctx := ctxFor(t)
	out := map[string]string{}
	iter := s.rdb.Scan(ctx, 0, s.k.p+":*", 1000).Iterator()
	for iter.Next(ctx) {
		typ, err := s.rdb.Type(ctx, iter.Val()).Result()
		if err != nil {
			t.Fatal(err)
		}
		out[iter.Val()] = typ
	}
	if err := iter.Err(); err != nil {
		t.Fatal(err)
	}
	return out
}

// TestKeyLayout checks the layout of doc.go: names, types, hash tags, and
// the expiry of every key of a finished job.
func TestKeyLayout(t *testing.T) {
	url := redistest.Start(t)
	s := newStore(t, url, Options{})
	ctx := ctxFor(t)
	if _, _, err := s.PutModel(ctx, jobs.ModelInfo{Name: "grid", Hash: "h1"}, []byte(`{"name":"grid"}`)); err != nil {
		t.Fatal(err)
	}
	j := testJob("J1")
	j.Tenant = "acme"
	j.IdempotencyKey = "client-key"
	create(t, s, j)
	for range 3 {
		if _, err := s.ClaimBlock(ctx, "J1", "w", 10, time.Minute); err != nil {
			t.Fatal(err)
		}
	}
	if err := s.CommitBlock(ctx, "J1", 0, "w", []byte(`{"n":8}`)); err != nil {
		t.Fatal(err)
	}
	setState(t, s, "J1", jobs.StateRunning)

	p := s.k.p
	want := map[string]string{
		p + ":{model:grid}":              "hash",
		p + ":{model:grid}:info":         "hash",
		p + ":{model:grid}:doc":          "hash",
		p + ":{global}:models":           "zset",
		p + ":{job:J1}":                  "hash",
		p + ":{job:J1}:next":             "string",
		p + ":{job:J1}:leases":           "zset",
		p + ":{job:J1}:holders":          "hash",
		p + ":{job:J1}:stats":            "hash",
		p + ":{global}:jobs":             "zset",
		p + ":{global}:seq":              "string",
		p + ":{global}:meta":             "hash",
		p + ":{global}:running":          "set",
		p + ":{global}:active":           "set",
		p + ":{global}:t:acme:jobs":      "zset",
		p + ":{global}:t:acme:running":   "set",
		p + ":{global}:t:acme:claimable": "zset",
		s.k.idem("acme", "client-key"):   "string",
	}
	got := keysUnder(t, s)
	if fmt.Sprint(got) != fmt.Sprint(want) {
		t.Fatalf("keys of one model and one running job:\n got %v\nwant %v", got, want)
	}
	for k := range got {
		tag := hashTag(k)
		switch {
		case strings.Contains(k, "{job:"):
			if tag != "job:J1" {
				t.Errorf("key %s hashes on %q; want job:J1", k, tag)
			}
		case strings.Contains(k, "{model:"):
			if tag != "model:grid" {
				t.Errorf("key %s hashes on %q; want model:grid", k, tag)
			}
		default:
			if tag != "global" {
				t.Errorf("key %s hashes on %q; want global", k, tag)
			}
		}
	}

	// Per-job memory, for the table in doc.go.
	var total int64
	for k := range got {
		if strings.Contains(k, "{job:") {
			n, err := s.rdb.MemoryUsage(ctx, k).Result()
			if err != nil {
				t.Fatal(err)
			}
			total += n
		}
	}
	t.Logf("memory of the keys of one job (small record, 3 leases, 1 block of stats): %d bytes", total)

	// Finishing the job gives all its keys, and its idempotency key, the
	// job's retention as time to live, and frees its place in the quota.
	if _, err := s.UpdateJob(ctx, "J1", func(j *jobs.Job) error {
		j.State, j.Retention = jobs.StateSucceeded, 90*time.Second
		return nil
	}); err != nil {
		t.Fatal(err)
	}
	jk := s.k.job("J1")
	for _, k := range []string{jk.rec, jk.next, jk.leases, jk.holders, jk.stats, s.k.idem("acme", "client-key")} {
		ttl, err := s.rdb.PTTL(ctx, k).Result()
		if err != nil {
			t.Fatal(err)
		}
		if ttl <= 0 || ttl > 90*time.Second {
			t.Errorf("TTL of %s after the job finished = %v; want in (0, 90s]", k, ttl)
		}
	}
	for _, k := range []string{s.k.tenant("acme", "claimable"), s.k.tenant("acme", "running"), s.k.running(), s.k.active()} {
		if n, err := s.rdb.Exists(ctx, k).Result(); err != nil || n != 0 {
			t.Errorf("%s exists after the only job finished (%v)", k, err)
		}
	}
	if n, err := s.rdb.ZCard(ctx, s.k.expiring()).Result(); err != nil || n != 1 {
		t.Fatalf("expiring index holds %d, %v; want the finished job", n, err)
	}
	// Back to queued (an operator's retry): the keys are kept again.
	setState(t, s, "J1", jobs.StateQueued)
	for _, k := range []string{jk.rec, jk.stats, s.k.idem("acme", "client-key")} {
		if ttl, err := s.rdb.PTTL(ctx, k).Result(); err != nil || ttl != -1 {
			t.Errorf("TTL of %s after the job was queued again = %v, %v; want none (-1ms)", k, ttl, err)
		}
	}
	if cl, err := s.ClaimableJobs(ctx, 0); err != nil || fmt.Sprint(cl) != "[{J1 acme normal}]" {
		t.Fatalf("ClaimableJobs after requeue = %v, %v; want [{J1 acme normal}]", cl, err)
	}
	if q, r, err := s.UnfinishedOf(ctx, "acme"); err != nil || q != 1 || r != 0 {
		t.Fatalf("UnfinishedOf(acme) after requeue = %d, %d, %v; want 1, 0", q, r, err)
	}
}

// BenchmarkIndexMemory measures, for doc.go and deploy/SCALING.md, what a
// job costs the indexes on {global}: their MEMORY USAGE per job, over b.N
// jobs of 4 tenants, half with an idempotency key, queued and then
// finished (and kept).
//
//	go test -run '^$' -bench IndexMemory -benchtime 2000x ./worker/redisstore/
func BenchmarkIndexMemory(b *testing.B) {
	url := redistest.Start(b)
	s := newStore(b, url, Options{SweepEvery: -1})
	ctx := ctxFor(b)
	globalBytes := func() int64 {
		var n int64
		for k := range keysUnder(b, s) {
			if hashTag(k) == "global" {
				m, err := s.rdb.MemoryUsage(ctx, k, 0).Result() // 0: every element
				if err != nil {
					b.Fatal(err)
				}
				n += m
			}
		}
		return n
	}
	id := func(i int) string { return fmt.Sprintf("j%023x", i) } // the length of the service's IDs
	before := globalBytes()
	for i := range b.N {
		j := testJob(id(i))
		j.Tenant = fmt.Sprintf("tenant-%d", i%4)
		if i%2 == 0 {
			j.IdempotencyKey = fmt.Sprint("key-", i)
		}
		create(b, s, j)
	}
	queued := globalBytes()
	for i := range b.N {
		setState(b, s, id(i), jobs.StateSucceeded)
	}
	finished := globalBytes()
	b.ReportMetric(float64(queued-before)/float64(b.N), "queued-B/job")
	b.ReportMetric(float64(finished-before)/float64(b.N), "finished-B/job")
}

// TestIndexPruned checks that index entries of expired jobs go away: at
// the next sweep, and when ListJobs meets a record that is gone.
func TestIndexPruned(t *testing.T) {
	url := redistest.Start(t)
	s := newStore(t, url, Options{})
	ctx := ctxFor(t)
	for _, id := range []string{"a", "b"} {
		j := testJob(id)
		j.Tenant = "acme"
		j.Retention = 50 * time.Millisecond
		create(t, s, j)
		setState(t, s, id, jobs.StateFailed)
	}
	jobstest.Eventually(t, 10*time.Second, "finished jobs expire", func() bool {
		n, err := s.rdb.Exists(ctx, s.k.job("a").rec, s.k.job("b").rec).Result()
		return err == nil && n == 0
	})
	// ListJobs skips and prunes entries whose record is gone.
	js, err := s.ListJobs(ctx, "acme", "", 0)
	if err != nil || len(js) != 0 {
		t.Fatalf("ListJobs = %v, %v; want none", js, err)
	}
	for _, k := range []string{s.k.jobIndex(), s.k.tenant("acme", "jobs"), s.k.meta(), s.k.expiring()} {
		if n, _ := s.rdb.Exists(ctx, k).Result(); n != 0 {
			t.Fatalf("%s still exists after ListJobs met expired records", k)
		}
	}
	// The sweep prunes by the expiring index, once the record is gone.
	j := testJob("c")
	j.Retention = 50 * time.Millisecond
	create(t, s, j)
	setState(t, s, "c", jobs.StateCancelled)
	jobstest.Eventually(t, 10*time.Second, "the sweep prunes an expired job", func() bool {
		rep, err := s.Sweep(ctx)
		if err != nil {
			t.Fatal(err)
		}
		_, err = s.rdb.ZScore(ctx, s.k.jobIndex(), "c").Result()
		return errors.Is(err, redis.Nil) && rep.Pruned == 1
	})
	if n, _ := s.rdb.ZCard(ctx, s.k.expiring()).Result(); n != 0 {
		t.Fatalf("expiring index holds %d entries after pruning", n)
	}
	if ok, _ := s.rdb.HExists(ctx, s.k.meta(), "c").Result(); ok {
		t.Fatalf("meta of the pruned job is kept")
	}
}

// TestRetriedScripts replays scripts whose reply was lost (the client
// retries after a network error): the replay must not apply twice.
func TestRetriedScripts(t *testing.T) {
	url := redistest.Start(t)
	s := newStore(t, url, Options{})
	ctx := ctxFor(t)
	jk := s.k.job("J")
	reserve := func(tok string) []string {
		t.Helper()
		res, err := reserveJobScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(), "J", "acme", 0, 0, 1, tok, "").StringSlice()
		if err != nil {
			t.Fatal(err)
		}
		return res
	}
	first, again := reserve("tok-1"), reserve("tok-1")
	if first[0] != "reserved" || fmt.Sprint(first) != fmt.Sprint(again) {
		t.Fatalf("reserve and its replay = %v, %v; want the same reservation", first, again)
	}
	if seq, _ := s.rdb.Get(ctx, s.k.seq()).Int(); seq != 1 {
		t.Fatalf("a replayed reservation ran twice: sequence %d", seq)
	}
	if res := reserve("tok-2"); res[0] != "taken" {
		t.Fatalf("reservation of a reserved ID by another call: %v; want taken", res)
	}
	write := func(tok string) string {
		t.Helper()
		res, err := writeJobScript.Run(ctx, s.rdb, []string{jk.rec}, `{"id":"J","tenant":"acme","state":"queued"}`, tok, first[1], "acme",
			first[2], s.window.Milliseconds(), 1, 1000).Text()
		if err != nil {
			t.Fatal(err)
		}
		return res
	}
	if w1, w2, w3 := write("tok-1"), write("tok-1"), write("tok-2"); w1 != "created" || w2 != "created" || w3 != "taken" {
		t.Fatalf("write, its replay, another call's write = %s, %s, %s; want created, created, taken", w1, w2, w3)
	}
	updKeys := []string{jk.rec, jk.next, jk.leases, jk.holders, jk.stats}
	var replies []string
	for range 2 {
		res, err := updateJobScript.Run(ctx, s.rdb, updKeys, "1", "tok-u", `{"id":"J","state":"running"}`, "running", 1000, 1).Text()
		if err != nil {
			t.Fatal(err)
		}
		replies = append(replies, res)
	}
	if fmt.Sprint(replies) != "[ok done]" {
		t.Fatalf("update and its replay replied %v; want [ok done]", replies)
	}
	if rev, _ := s.rdb.HGet(ctx, jk.rec, "rev").Result(); rev != "2" {
		t.Fatalf("revision after an update and its replay = %s; want 2", rev)
	}
	// An update from a stale read by another call is a conflict.
	if res, _ := updateJobScript.Run(ctx, s.rdb, updKeys, "1", "tok-v", `{}`, "failed", 1000, 1).Text(); res != "conflict" {
		t.Fatalf("stale update replied %s; want conflict", res)
	}
	// Syncs of the indexes apply once, and in revision order only.
	sync := func(rev int, state string) string {
		t.Helper()
		res, err := syncJobScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(), "J", rev, state, 1, first[1], 1000).Text()
		if err != nil {
			t.Fatal(err)
		}
		return res
	}
	if a, b := sync(2, "running"), sync(2, "running"); a != "ok" || b != "old" {
		t.Fatalf("sync and its replay = %s, %s; want ok, old", a, b)
	}
	if q, r, err := s.UnfinishedOf(ctx, "acme"); err != nil || q != 0 || r != 1 {
		t.Fatalf("UnfinishedOf(acme) = %d, %d, %v; want 0, 1", q, r, err)
	}
	// The sync of revision 4 (finished) overtakes that of revision 3.
	if a, b := sync(4, "succeeded"), sync(3, "running"); a != "ok" || b != "old" {
		t.Fatalf("syncs of revisions 4 then 3 = %s, %s; want ok, old", a, b)
	}
	if q, r, err := s.UnfinishedOf(ctx, "acme"); err != nil || q != 0 || r != 0 {
		t.Fatalf("UnfinishedOf(acme) after the finishing sync = %d, %d, %v; want 0, 0", q, r, err)
	}
}

// TestUpdateConflictExhausted: when every attempt meets a newer record,
// UpdateJob gives up with ErrConflict after a bounded number of tries.
func TestUpdateConflictExhausted(t *testing.T) {
	url := redistest.Start(t)
	s := newStore(t, url, Options{})
	other := newStore(t, url, Options{KeyPrefix: s.k.p})
	ctx := ctxFor(t)
	create(t, s, testJob("J"))
	calls := 0
	_, err := s.UpdateJob(ctx, "J", func(j *jobs.Job) error {
		calls++
		// Another process writes between this read and the write.
		_, err := other.UpdateJob(ctx, "J", func(j *jobs.Job) error { j.MergedBlocks++; return nil })
		j.Error = "never stored"
		return err
	})
	if !errors.Is(err, jobs.ErrConflict) {
		t.Fatalf("UpdateJob against a writer that always wins: %v; want ErrConflict", err)
	}
	if calls != maxUpdateAttempts {
		t.Fatalf("fn ran %d times; want %d", calls, maxUpdateAttempts)
	}
	j, _ := s.GetJob(ctx, "J")
	if j.Error != "" || j.MergedBlocks != maxUpdateAttempts {
		t.Fatalf("record after the lost updates: error %q, merged %d; want none, %d", j.Error, j.MergedBlocks, maxUpdateAttempts)
	}
}

func TestUpdateRejectsUnknownState(t *testing.T) {
	url := redistest.Start(t)
	s := newStore(t, url, Options{})
	ctx := ctxFor(t)
	create(t, s, testJob("J"))
	_, err := s.UpdateJob(ctx, "J", func(j *jobs.Job) error { j.State = "paused"; return nil })
	if err == nil || !strings.Contains(err.Error(), `"paused"`) {
		t.Fatalf("UpdateJob to state paused: %v; want an error naming the state", err)
	}
	if j, _ := s.GetJob(ctx, "J"); j.State != jobs.StateQueued {
		t.Fatalf("state after the refused update = %s", j.State)
	}
}

// TestSkewMargin: a lease that ended less than the margin ago is neither
// claimable by others nor lost to its holder, both judged by the server's
// clock.
func TestSkewMargin(t *testing.T) {
	url := redistest.Start(t)
	s := newStore(t, url, Options{SkewMargin: 5 * time.Second})
	ctx := ctxFor(t)
	create(t, s, testJob("J"))
	if b, err := s.ClaimBlock(ctx, "J", "w1", 1, 50*time.Millisecond); err != nil || b != 0 {
		t.Fatalf("claim = %d, %v", b, err)
	}
	time.Sleep(300 * time.Millisecond) // the lease has ended; the margin has not
	if b, err := s.ClaimBlock(ctx, "J", "w2", 1, time.Minute); err != nil || b != -1 {
		t.Fatalf("claim within the skew margin = %d, %v; want -1", b, err)
	}
	if err := s.CommitBlock(ctx, "J", 0, "w1", []byte("x")); err != nil {
		t.Fatalf("holder's commit within the skew margin: %v; want success", err)
	}
}

// TestConcurrentProcesses runs claims, updates and creations from several
// Stores (separate connection pools, as separate processes have).
func TestConcurrentProcesses(t *testing.T) {
	url := redistest.Start(t)
	first := newStore(t, url, Options{})
	stores := []*Store{first}
	for range 3 {
		stores = append(stores, newStore(t, url, Options{KeyPrefix: first.k.p}))
	}
	ctx := ctxFor(t)
	create(t, first, testJob("J"))

	const blocks = 300
	var (
		mu    sync.Mutex
		owner = map[int64]int{}
		dups  []int64
		wg    sync.WaitGroup
	)
	errs := make(chan error, 64)
	for i, s := range stores {
		for g := range 2 {
			wg.Add(1)
			go func() {
				defer wg.Done()
				w := fmt.Sprintf("p%d-g%d", i, g)
				for {
					b, err := s.ClaimBlock(ctx, "J", w, blocks, time.Minute)
					if err != nil {
						errs <- err
						return
					}
					if b < 0 {
						return
					}
					mu.Lock()
					if _, ok := owner[b]; ok {
						dups = append(dups, b)
					}
					owner[b] = i
					mu.Unlock()
					if err := s.CommitBlock(ctx, "J", b, w, []byte(w)); err != nil {
						errs <- err
						return
					}
					if _, err := s.UpdateJob(ctx, "J", func(j *jobs.Job) error { j.MergedBlocks++; return nil }); err != nil {
						errs <- err
						return
					}
				}
			}()
		}
	}
	wg.Wait()
	close(errs)
	for err := range errs {
		t.Fatal(err)
	}
	if len(dups) > 0 || len(owner) != blocks {
		t.Fatalf("%d blocks handed out, duplicates %v; want each of %d exactly once", len(owner), dups, blocks)
	}
	j, err := first.GetJob(ctx, "J")
	if err != nil || j.MergedBlocks != blocks {
		t.Fatalf("merged_blocks = %d, %v; want %d (no lost update)", j.MergedBlocks, err, blocks)
	}

	// Creations racing for the last places of the queue.
	var created, full int
	var cmu sync.Mutex
	for i := range 16 {
		wg.Add(1)
		go func() {
			defer wg.Done()
			j := testJob(fmt.Sprint("C", i))
			_, ok, err := stores[i%len(stores)].CreateJob(ctx, j, jobs.CreateLimits{MaxUnfinished: 6}) // J is unfinished: 5 places left
			cmu.Lock()
			defer cmu.Unlock()
			switch {
			case err == nil && ok:
				created++
			case errors.Is(err, jobs.ErrQueueFull):
				full++
			default:
				t.Errorf("CreateJob(%s): %v", j.ID, err)
			}
		}()
	}
	wg.Wait()
	if created != 5 || full != 11 {
		t.Fatalf("16 racing creations at capacity 6 with 1 unfinished: %d created, %d refused; want 5, 11", created, full)
	}

	// Creations racing with one idempotency key.
	var sameKey int
	var ids sync.Map
	for i := range 16 {
		wg.Add(1)
		go func() {
			defer wg.Done()
			k := testJob(fmt.Sprint("K", i))
			k.IdempotencyKey = "same"
			got, ok, err := stores[i%len(stores)].CreateJob(ctx, k, jobs.CreateLimits{})
			if err != nil {
				t.Errorf("CreateJob(%s): %v", k.ID, err)
				return
			}
			cmu.Lock()
			defer cmu.Unlock()
			if ok {
				sameKey++
			}
			ids.Store(got.ID, true)
		}()
	}
	wg.Wait()
	n := 0
	ids.Range(func(any, any) bool { n++; return true })
	if sameKey != 1 || n != 1 {
		t.Fatalf("16 creations with one idempotency key: %d created, %d distinct jobs returned; want 1, 1", sameKey, n)
	}
}

// TestUnavailable: with Redis down every call fails fast with
// ErrUnavailable, and the Store recovers when Redis is back.
func TestUnavailable(t *testing.T) {
	srv := redistest.StartServer(t, redistest.Options{})
	s := newStore(t, srv.URL(), Options{})
	create(t, s, testJob("J"))
	srv.Stop()

	ctx := ctxFor(t)
	calls := map[string]func() error{
		"Ping":          func() error { return s.Ping(ctx) },
		"PutModel":      func() error { _, _, err := s.PutModel(ctx, jobs.ModelInfo{Name: "m", Hash: "h"}, nil); return err },
		"GetModel":      func() error { _, _, err := s.GetModel(ctx, "m", 0); return err },
		"ListModels":    func() error { _, err := s.ListModels(ctx, "", 10); return err },
		"DeleteModel":   func() error { return s.DeleteModel(ctx, "m") },
		"CreateJob":     func() error { _, _, err := s.CreateJob(ctx, testJob("K"), jobs.CreateLimits{}); return err },
		"GetJob":        func() error { _, err := s.GetJob(ctx, "J"); return err },
		"ListJobs":      func() error { _, err := s.ListJobs(ctx, "", "", 10); return err },
		"UpdateJob":     func() error { _, err := s.UpdateJob(ctx, "J", func(*jobs.Job) error { return nil }); return err },
		"Unfinished":    func() error { _, _, err := s.Unfinished(ctx); return err },
		"UnfinishedOf":  func() error { _, _, err := s.UnfinishedOf(ctx, "acme"); return err },
		"Sweep":         func() error { _, err := s.Sweep(ctx); return err },
		"ClaimableJobs": func() error { _, err := s.ClaimableJobs(ctx, 10); return err },
		"ClaimBlock":    func() error { _, err := s.ClaimBlock(ctx, "J", "w", 1, time.Minute); return err },
		"ExtendLease":   func() error { return s.ExtendLease(ctx, "J", 0, "w", time.Minute) },
		"CommitBlock":   func() error { return s.CommitBlock(ctx, "J", 0, "w", nil) },
		"ReleaseBlock":  func() error { return s.ReleaseBlock(ctx, "J", 0, "w") },
		"BlockStats":    func() error { _, err := s.BlockStats(ctx, "J", 0, 1); return err },
		"DropBlocks":    func() error { return s.DropBlocks(ctx, "J", -1) },
		"Notify":        func() error { return s.Notify(ctx, "J") },
		"Subscribe":     func() error { _, _, err := s.Subscribe(ctx, "J"); return err },
	}
	// The bound is the store's fail-fast promise with its 1s timeouts:
	// against a closed port each call fails at the first dial.
	const bound = 2 * time.Second
	for name, call := range calls {
		start := time.Now()
		err := call()
		took := time.Since(start)
		if !errors.Is(err, jobs.ErrUnavailable) {
			t.Errorf("%s with Redis down: %v; want ErrUnavailable", name, err)
		}
		if took > bound {
			t.Errorf("%s with Redis down took %v; want < %v", name, took, bound)
		}
	}
	// The caller's own cancellation is reported as such.
	cctx, cancel := context.WithCancel(context.Background())
	cancel()
	if _, err := s.GetJob(cctx, "J"); !errors.Is(err, context.Canceled) || errors.Is(err, jobs.ErrUnavailable) {
		t.Errorf("GetJob with a cancelled context: %v; want context.Canceled", err)
	}
	// New against a server that is down.
	nctx, ncancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer ncancel()
	if _, err := New(nctx, srv.URL(), Options{KeyPrefix: "x"}); !errors.Is(err, jobs.ErrUnavailable) {
		t.Errorf("New with Redis down: %v; want ErrUnavailable", err)
	}

	srv.StartAgain() // empty: no persistence
	jobstest.Eventually(t, 10*time.Second, "the store works again once Redis is back", func() bool {
		return s.Ping(ctx) == nil
	})
	create(t, s, testJob("J2"))
}

// TestRestartKeepsWorking: a Store survives a server restart: calls fail
// while it is down and work again after, and subscriptions are renewed and
// signalled (changes may have been missed).
func TestRestartKeepsWorking(t *testing.T) {
	srv := redistest.StartServer(t, redistest.Options{})
	s := newStore(t, srv.URL(), Options{})
	ctx := ctxFor(t)
	sig, cancel, err := s.Subscribe(ctx, "topic")
	if err != nil {
		t.Fatal(err)
	}
	defer cancel()
	if err := s.Notify(ctx, "topic"); err != nil {
		t.Fatal(err)
	}
	jobstest.Eventually(t, 10*time.Second, "first signal", func() bool { return len(sig) == 1 })
	<-sig

	srv.Restart()
	jobstest.Eventually(t, 10*time.Second, "a signal after the connection came back", func() bool { return len(sig) == 1 })
	jobstest.Eventually(t, 10*time.Second, "calls work after the restart", func() bool {
		_, _, err := s.CreateJob(ctx, testJob("after"), jobs.CreateLimits{})
		return err == nil
	})
	// The subscription is live again: a notification gets through.
	jobstest.Eventually(t, 10*time.Second, "notifications after the restart", func() bool {
		drainSignals(sig)
		if err := s.Notify(ctx, "topic"); err != nil {
			return false
		}
		select {
		case <-sig:
			return true
		case <-time.After(200 * time.Millisecond):
			return false
		}
	})
}

func drainSignals(ch <-chan struct{}) {
	for {
		select {
		case <-ch:
		default:
			return
		}
	}
}

// TestAppendOnlySurvivesRestart: with the append-only file on, models,
// jobs, leases and statistics survive a restart of the server.
func TestAppendOnlySurvivesRestart(t *testing.T) {
	srv := redistest.StartServer(t, redistest.Options{AppendOnly: true})
	s := newStore(t, srv.URL(), Options{})
	ctx := ctxFor(t)
	if _, _, err := s.PutModel(ctx, jobs.ModelInfo{Name: "m", Hash: "h"}, []byte("doc")); err != nil {
		t.Fatal(err)
	}
	create(t, s, testJob("J"))
	setState(t, s, "J", jobs.StateRunning)
	for range 2 {
		if _, err := s.ClaimBlock(ctx, "J", "w", 10, time.Hour); err != nil {
			t.Fatal(err)
		}
	}
	if err := s.CommitBlock(ctx, "J", 0, "w", []byte("stats-0")); err != nil {
		t.Fatal(err)
	}

	srv.Restart()
	jobstest.Eventually(t, 10*time.Second, "the store answers after the restart", func() bool { return s.Ping(ctx) == nil })
	if _, doc, err := s.GetModel(ctx, "m", 1); err != nil || string(doc) != "doc" {
		t.Fatalf("model after restart: %q, %v", doc, err)
	}
	if j, err := s.GetJob(ctx, "J"); err != nil || j.State != jobs.StateRunning {
		t.Fatalf("job after restart: %v, %v", j, err)
	}
	if st, err := s.BlockStats(ctx, "J", 0, 5); err != nil || len(st) != 1 || string(st[0]) != "stats-0" {
		t.Fatalf("statistics after restart: %q, %v", st, err)
	}
	if err := s.ExtendLease(ctx, "J", 1, "w", time.Hour); err != nil {
		t.Fatalf("the lease of block 1 after restart: %v", err)
	}
	if b, err := s.ClaimBlock(ctx, "J", "w", 10, time.Hour); err != nil || b != 2 {
		t.Fatalf("next claim after restart = %d, %v; want 2", b, err)
	}
	if q, r, err := s.Unfinished(ctx); err != nil || q != 0 || r != 1 {
		t.Fatalf("Unfinished after restart = %d, %d, %v; want 0, 1", q, r, err)
	}
}

// TestNoGoroutineLeaks: subscriptions ended by cancel, by their context or
// by Close leave no goroutine behind, nor does the Store.
func TestNoGoroutineLeaks(t *testing.T) {
	url := redistest.Start(t)
	prefix := redistest.KeyPrefix(t, url)
	jobstest.CheckGoroutines(t)
	ctx, cancelAll := context.WithCancel(context.Background())
	defer cancelAll()
	s, err := New(ctx, url, Options{KeyPrefix: prefix})
	if err != nil {
		t.Fatal(err)
	}
	var cancels []func()
	for i := range 30 {
		// For i%3 == 0 a context that never ends: only cancel ends the
		// subscription.
		sctx, end := context.Background(), func() {}
		if i%3 != 0 {
			c, cancel := context.WithCancel(ctx)
			sctx, end = c, cancel
		}
		_, cancel, err := s.Subscribe(sctx, fmt.Sprint("t", i%5))
		if err != nil {
			end()
			t.Fatal(err)
		}
		switch i % 3 {
		case 0:
			cancel()
		case 1:
			end() // the context ends the subscription
			cancels = append(cancels, cancel)
		default: // left open until Close
			cancels = append(cancels, cancel, end)
		}
	}
	if err := s.Notify(ctx, "t1"); err != nil {
		t.Fatal(err)
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	for _, c := range cancels {
		c() // cancelling after Close is harmless
	}
	if _, _, err := s.Subscribe(ctx, "t"); !errors.Is(err, jobs.ErrUnavailable) {
		t.Fatalf("Subscribe after Close: %v; want ErrUnavailable", err)
	}
	if err := s.Ping(ctx); !errors.Is(err, jobs.ErrUnavailable) {
		t.Fatalf("Ping after Close: %v; want ErrUnavailable", err)
	}
}

func TestNewRejectsBadOptions(t *testing.T) {
	ctx := ctxFor(t)
	for _, c := range []struct {
		url  string
		opt  Options
		want string
	}{
		{"http://127.0.0.1:1/0", Options{}, "url"},
		{"redis://127.0.0.1:1/0", Options{KeyPrefix: "a{b"}, "key prefix"},
		{"redis://127.0.0.1:1/0", Options{SkewMargin: -time.Second}, "skew margin"},
	} {
		if _, err := New(ctx, c.url, c.opt); err == nil || !strings.Contains(err.Error(), c.want) {
			t.Errorf("New(%s, %+v) = %v; want an error about the %s", c.url, c.opt, err, c.want)
		}
	}
}

// TestCallerDeadline: when the caller's deadline passes while Redis is
// slow, the error is the caller's context.DeadlineExceeded, not
// ErrUnavailable.
func TestCallerDeadline(t *testing.T) {
	srv := redistest.StartServer(t, redistest.Options{})
	s := newStore(t, srv.URL(), Options{})
	ctx := ctxFor(t)
	create(t, s, testJob("J"))
	// CLIENT PAUSE holds every client's commands on the server for 500ms.
	admin := newStore(t, srv.URL(), Options{KeyPrefix: s.k.p})
	if err := admin.rdb.Do(ctx, "CLIENT", "PAUSE", 500, "ALL").Err(); err != nil {
		t.Fatal(err)
	}
	dctx, cancel := context.WithTimeout(ctx, 100*time.Millisecond)
	defer cancel()
	_, err := s.GetJob(dctx, "J")
	if !errors.Is(err, context.DeadlineExceeded) || errors.Is(err, jobs.ErrUnavailable) {
		t.Fatalf("GetJob past the caller's deadline: %v; want context.DeadlineExceeded", err)
	}
	jobstest.Eventually(t, 10*time.Second, "calls work once the pause ends", func() bool {
		_, err := s.GetJob(ctx, "J")
		return err == nil
	})
}
