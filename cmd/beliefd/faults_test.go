package main

// The fault suite: one API process and three worker processes on one Redis
// with its append-only file on, fifty jobs, and during the run a worker
// killed while it holds a lease, another stopped past its lease, Redis
// restarted and the API process restarted. Every job must succeed with the
// exact sample total and the same numbers, bit for bit, as one process
// computing the same query with the same seed. Then Redis goes away: the
// service must say so at once (503) and come back by itself.

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"math/rand/v2"
	"net/http"
	"os"
	"regexp"
	"sort"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"

	"github.com/beliefd/beliefd/service/examples"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/worker/redisstore"
	"github.com/beliefd/beliefd/worker/redisstore/redistest"
)

// Bounds of the fault suite.
const (
	// faultLease is the workers' --lease-time: short, so that a stopped
	// worker's block is taken up within seconds.
	faultLease = 2 * time.Second
	// faultFinish bounds the wait for every job to end after the last fault.
	faultFinish = 90 * time.Second
	// faultCall bounds one HTTP call of the test's client.
	faultCall = 10 * time.Second
	// failFast bounds a call while Redis is down: the store's client makes
	// at most two attempts (MaxRetries 1) of a 1s dial and 1s read each,
	// plus a 100ms back-off (worker/redisstore/store.go); on loopback a
	// refused dial returns at once. A call still open after this hangs.
	failFast = 5 * time.Second
	// readyWithin bounds how long /readyz may keep answering 200 after
	// Redis is gone: one readiness check is bounded by 2s
	// (httpapi.DefaultReadyTimeout) and each poll starts 100ms apart.
	readyWithin = 5 * time.Second
	// reconnectWithin bounds how long the processes take to be ready again
	// once Redis is back; the client dials on demand, so the first call
	// after the restart reconnects.
	reconnectWithin = 15 * time.Second
)

// positiveModelDoc generates a small network whose every table entry is
// positive (each weight is at least 0.05 before normalising), for the Gibbs
// jobs: Gibbs sampling refuses both the example and the chest clinic,
// whose deterministic gates could trap a chain.
func positiveModelDoc() []byte {
	rng := rand.New(rand.NewPCG(20261203, 7))
	doc := model.Document{Name: "positive-12"}
	cards := map[string]int{}
	for i := range 12 {
		name := fmt.Sprintf("v%d", i)
		card := 2 + rng.IntN(2)
		cards[name] = card
		v := model.Variable{Name: name}
		for s := range card {
			v.States = append(v.States, fmt.Sprintf("s%d", s))
		}
		rows := 1
		for p := max(0, i-4); p < i && len(v.Parents) < 2; p++ {
			if rng.IntN(2) == 0 {
				v.Parents = append(v.Parents, fmt.Sprintf("v%d", p))
				rows *= cards[fmt.Sprintf("v%d", p)]
			}
		}
		for range rows {
			row, sum := make([]float64, card), 0.0
			for s := range row {
				row[s] = 0.05 + rng.Float64()
				sum += row[s]
			}
			for s := range row {
				row[s] /= sum
			}
			v.Table = append(v.Table, row)
		}
		doc.Variables = append(doc.Variables, v)
	}
	b, err := json.Marshal(doc)
	if err != nil {
		panic(err)
	}
	return b
}

// faultQueries is the job mix of the suite: 50 queries over the example,
// the chest clinic and the positive model, in a fixed shuffled order.
func faultQueries() []*infer.Query {
	var qs []*infer.Query
	add := func(modelName, method string, ev map[string]string, soft map[string][]float64, targets []string, samples int64, mpe bool) {
		seed := uint64(7100 + len(qs))
		qs = append(qs, &infer.Query{
			Model: modelName, Evidence: ev, SoftEvidence: soft, Targets: targets, Method: method, MPE: mpe,
			Stop: infer.StopRule{MaxSamples: samples}, Seed: &seed,
			IdempotencyKey: fmt.Sprintf("fault-suite-%d", len(qs)),
		})
	}
	// Budgets end mid-block (8192 samples a block) or on a block boundary:
	// 2*8192+5, 3*8192+101, 4*8192.
	budgets := []int64{16389, 24677, 32768}
	tarnEv := []map[string]string{
		{"alarm_checkout_5xx": "firing"},
		{"alarm_checkout_5xx": "firing", "alarm_synthetic_checkout": "firing"},
		{"alarm_inlet_temp": "firing", "alarm_power_bus": "quiet"},
		{"alarm_db_replication_lag": "firing", "alarm_canary": "quiet"},
	}
	tarnTargets := [][]string{{"bad_deploy", "orders_db", "core_network"}, {"cooling", "site_power"}, {"checkout_api", "storage"}}
	for i := range 12 {
		var soft map[string][]float64
		if i%4 == 1 {
			soft = map[string][]float64{"alarm_storage_latency": {0.2, 0.9}}
		}
		add("tarnwick-platform", infer.MethodLikelihoodWeighting, tarnEv[i%4], soft, tarnTargets[i%3], budgets[i%3], false)
	}
	for i := range 5 {
		add("tarnwick-platform", infer.MethodForward, nil, nil, tarnTargets[i%3], budgets[i%3], false)
		add("tarnwick-platform", infer.MethodRejection, tarnEv[i%4], nil, tarnTargets[(i+1)%3], budgets[(i+1)%3], false)
		add("tarnwick-platform", infer.MethodExact, tarnEv[i%4], nil, tarnTargets[i%3], 0, i%2 == 0)
	}
	chestEv := []map[string]string{{"xray": "yes"}, {"dysp": "yes", "asia": "yes"}, {"smoke": "yes", "xray": "yes", "dysp": "no"}}
	chestTargets := [][]string{{"tub", "lung", "bronc", "either"}, nil}
	for i := range 8 {
		add("chest-clinic", infer.MethodLikelihoodWeighting, chestEv[i%3], nil, chestTargets[i%2], budgets[i%3]+8192, false)
	}
	for i := range 4 {
		add("chest-clinic", infer.MethodRejection, chestEv[i%3], nil, chestTargets[i%2], budgets[i%3], false)
	}
	for i := range 3 {
		add("chest-clinic", infer.MethodForward, nil, nil, chestTargets[i%2], budgets[i%3], false)
		add("chest-clinic", infer.MethodExact, chestEv[i%3], nil, chestTargets[i%2], 0, i != 1)
	}
	gibbsEv := []map[string]string{{"v11": "s1"}, {"v9": "s0", "v10": "s1"}, nil}
	for i := range 5 {
		add("positive-12", infer.MethodGibbs, gibbsEv[i%3], nil, nil, []int64{12000, 20000}[i%2], false)
	}
	rand.New(rand.NewPCG(1, 2)).Shuffle(len(qs), func(i, j int) { qs[i], qs[j] = qs[j], qs[i] })
	return qs
}

// faultClient is the suite's HTTP client: it retries what a fault can
// cause (connection errors while the API restarts, 503 while Redis does)
// and counts those retries; any other status is returned as it is.
type faultClient struct {
	base string
	hc   *http.Client

	mu       sync.Mutex
	retries  map[string]int // by cause
	statuses map[int]int    // every status seen
}

func newFaultClient(base string) *faultClient {
	return &faultClient{base: base, hc: &http.Client{Timeout: faultCall}, retries: map[string]int{}, statuses: map[int]int{}}
}

func (c *faultClient) once(method, path string, body []byte) (int, []byte, error) {
	var r io.Reader
	if body != nil {
		r = bytes.NewReader(body)
	}
	req, err := http.NewRequest(method, c.base+path, r)
	if err != nil {
		return 0, nil, err
	}
	if body != nil {
		req.Header.Set("Content-Type", "application/json")
	}
	resp, err := c.hc.Do(req)
	if err != nil {
		return 0, nil, err
	}
	defer resp.Body.Close()
	data, err := io.ReadAll(resp.Body)
	c.mu.Lock()
	c.statuses[resp.StatusCode]++
	c.mu.Unlock()
	return resp.StatusCode, data, err
}

// call makes a request, retrying connection errors and 503 for up to
// `within`, 100ms apart.
func (c *faultClient) call(t *testing.T, method, path string, body []byte, within time.Duration) (int, []byte) {
	t.Helper()
	deadline := time.Now().Add(within)
	for attempt := 0; ; attempt++ {
		status, data, err := c.once(method, path, body)
		cause := ""
		switch {
		case err != nil:
			cause = "connection"
		case status == http.StatusServiceUnavailable:
			cause = "503"
		default:
			return status, data
		}
		if time.Now().After(deadline) || attempt >= 1000 {
			t.Fatalf("%s %s: still failing after %s: status %d, err %v, body %s", method, path, within, status, err, data)
		}
		c.mu.Lock()
		c.retries[cause]++
		c.mu.Unlock()
		time.Sleep(100 * time.Millisecond)
	}
}

// jobView is what the suite reads of GET /v1/jobs/{id}.
type faultJobView struct {
	ID      string `json:"id"`
	State   string `json:"state"`
	Samples int64  `json:"samples"`
	Job     struct {
		State        string    `json:"state"`
		Blocks       int64     `json:"blocks"`
		MergedBlocks int64     `json:"merged_blocks"`
		Error        string    `json:"error"`
		CreatedAt    time.Time `json:"created_at"`
		FinishedAt   time.Time `json:"finished_at"`
	} `json:"job"`
}

func (c *faultClient) getJob(t *testing.T, id string) (faultJobView, []byte) {
	t.Helper()
	status, data := c.call(t, "GET", "/v1/jobs/"+id, nil, 30*time.Second)
	if status != http.StatusOK {
		t.Fatalf("GET job %s: %d %s", id, status, data)
	}
	var v faultJobView
	if err := json.Unmarshal(data, &v); err != nil {
		t.Fatalf("GET job %s: %v: %s", id, err, data)
	}
	return v, data
}

func (c *faultClient) submit(t *testing.T, q *infer.Query) string {
	t.Helper()
	body, err := json.Marshal(q)
	if err != nil {
		t.Fatal(err)
	}
	status, data := c.call(t, "POST", "/v1/jobs", body, 30*time.Second)
	// 202 for a new job, 200 when a retried submission found its first try.
	if status != http.StatusAccepted && status != http.StatusOK {
		t.Fatalf("submit %s: %d %s", q.IdempotencyKey, status, data)
	}
	var v faultJobView
	if err := json.Unmarshal(data, &v); err != nil || v.ID == "" {
		t.Fatalf("submit %s: %v: %s", q.IdempotencyKey, err, data)
	}
	return v.ID
}

// signal sends sig to a process started by startProc.
func (p *proc) signal(t *testing.T, sig syscall.Signal) {
	t.Helper()
	if err := p.cmd.Process.Signal(sig); err != nil {
		t.Fatalf("signal %v to %d: %v", sig, p.cmd.Process.Pid, err)
	}
}

// kill9 kills the process and waits for it to end.
func (p *proc) kill9(t *testing.T) {
	t.Helper()
	p.signal(t, syscall.SIGKILL)
	select {
	case err := <-p.done:
		p.done <- err // for the cleanup
	case <-time.After(10 * time.Second):
		t.Fatalf("process %d did not die of SIGKILL within 10s", p.cmd.Process.Pid)
	}
}

// waitStopped waits until the process shows state T (stopped) in
// /proc/PID/stat, so that it runs no more code.
func waitStopped(t *testing.T, pid int) {
	t.Helper()
	deadline := time.Now().Add(5 * time.Second)
	for time.Now().Before(deadline) {
		b, err := os.ReadFile(fmt.Sprintf("/proc/%d/stat", pid))
		if err != nil {
			t.Fatalf("read state of %d: %v", pid, err)
		}
		if i := bytes.LastIndexByte(b, ')'); i >= 0 && i+2 < len(b) && (b[i+2] == 'T' || b[i+2] == 't') {
			return
		}
		time.Sleep(time.Millisecond)
	}
	t.Fatalf("process %d not stopped 5s after SIGSTOP", pid)
}

// workerPIDRe matches the process ID in a worker ID (HOST-PID-RANDOM/N,
// the default worker.Config.Name and its goroutine number).
var workerPIDRe = regexp.MustCompile(`-(\d+)-[0-9a-f]+/\d+$`)

// heldUnit is a block (or single work unit) leased to a worker.
type heldUnit struct {
	job    string
	block  int64
	worker string
	expiry int64 // lease expiry, Redis server milliseconds
}

// leasesHeld lists the unexpired leases of the given jobs held by process
// pid, read straight from Redis (key layout: worker/redisstore/doc.go).
func leasesHeld(ctx context.Context, rdb *redis.Client, jobIDs []string, pid int) ([]heldUnit, error) {
	now, err := rdb.Time(ctx).Result()
	if err != nil {
		return nil, err
	}
	pipe := rdb.Pipeline()
	holders := make([]*redis.MapStringStringCmd, len(jobIDs))
	leases := make([]*redis.ZSliceCmd, len(jobIDs))
	for i, id := range jobIDs {
		holders[i] = pipe.HGetAll(ctx, redisstore.DefaultKeyPrefix+":{job:"+id+"}:holders")
		leases[i] = pipe.ZRangeWithScores(ctx, redisstore.DefaultKeyPrefix+":{job:"+id+"}:leases", 0, -1)
	}
	if _, err := pipe.Exec(ctx); err != nil && !errors.Is(err, redis.Nil) {
		return nil, err
	}
	var out []heldUnit
	for i, id := range jobIDs {
		expiry := map[string]int64{}
		for _, z := range leases[i].Val() {
			expiry[fmt.Sprint(z.Member)] = int64(z.Score)
		}
		for block, w := range holders[i].Val() {
			m := workerPIDRe.FindStringSubmatch(w)
			if m == nil || m[1] != strconv.Itoa(pid) || expiry[block] <= now.UnixMilli() {
				continue
			}
			b, _ := strconv.ParseInt(block, 10, 64)
			out = append(out, heldUnit{job: id, block: b, worker: w, expiry: expiry[block]})
		}
	}
	return out, nil
}

// pause stops processes (SIGSTOP) and waits until they are stopped.
func pause(t *testing.T, ps ...*proc) {
	t.Helper()
	for _, p := range ps {
		p.signal(t, syscall.SIGSTOP)
		waitStopped(t, p.cmd.Process.Pid)
	}
}

// resume continues stopped processes (SIGCONT).
func resume(t *testing.T, ps ...*proc) {
	t.Helper()
	for _, p := range ps {
		p.signal(t, syscall.SIGCONT)
	}
}

// freezeHolding stops worker w at a moment when it holds a lease on one of
// the jobs, and returns that unit: SIGSTOP, wait until stopped, look at the
// leases in Redis, SIGCONT and try again a few milliseconds later if it
// holds none. beforeStop, if not nil, runs just before each SIGSTOP. It
// fails the test if no such moment comes within 30s.
func freezeHolding(t *testing.T, rdb *redis.Client, w *proc, jobIDs []string, beforeStop func()) heldUnit {
	t.Helper()
	pid := w.cmd.Process.Pid
	deadline := time.Now().Add(30 * time.Second)
	for attempt := 0; attempt < 5000 && time.Now().Before(deadline); attempt++ {
		if beforeStop != nil {
			beforeStop()
		}
		w.signal(t, syscall.SIGSTOP)
		waitStopped(t, pid)
		ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
		held, err := leasesHeld(ctx, rdb, jobIDs, pid)
		cancel()
		if err != nil {
			t.Fatalf("read leases: %v", err)
		}
		if len(held) > 0 {
			// A command the worker sent just before it stopped (a commit,
			// a release) may not have reached Redis yet: look again once
			// it has, and keep the unit only if it is still held.
			time.Sleep(50 * time.Millisecond)
			ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
			again, err := leasesHeld(ctx, rdb, jobIDs, pid)
			cancel()
			if err != nil {
				t.Fatalf("read leases: %v", err)
			}
			for _, h := range again {
				if h.job == held[0].job && h.block == held[0].block {
					return h
				}
			}
		}
		w.signal(t, syscall.SIGCONT)
		time.Sleep(2 * time.Millisecond)
	}
	t.Fatalf("worker %d held no lease on jobs %v within 30s", pid, jobIDs)
	return heldUnit{}
}

// jobEndedAndDropped reports whether the job of unit u has ended and its
// block keys are gone (the service drops them when a job ends), so that
// nothing of the unit is left to commit to.
func jobEndedAndDropped(t *testing.T, rdb *redis.Client, c *faultClient, u heldUnit) bool {
	t.Helper()
	v, _ := c.getJob(t, u.job)
	if v.State != "succeeded" && v.State != "failed" && v.State != "cancelled" {
		return false
	}
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	n, err := rdb.Exists(ctx, redisstore.DefaultKeyPrefix+":{job:"+u.job+"}:stats", redisstore.DefaultKeyPrefix+":{job:"+u.job+"}:holders").Result()
	return err == nil && n == 0
}

// blockOutcomes sums beliefd_block_duration_seconds_count by outcome from
// a process's /metrics.
func blockOutcomes(t *testing.T, addr string) map[string]float64 {
	t.Helper()
	hc := &http.Client{Timeout: faultCall}
	resp, err := hc.Get("http://" + addr + "/metrics")
	if err != nil {
		t.Fatalf("scrape %s: %v", addr, err)
	}
	defer resp.Body.Close()
	data, _ := io.ReadAll(resp.Body)
	out := map[string]float64{}
	re := regexp.MustCompile(`(?m)^beliefd_block_duration_seconds_count\{[^}]*outcome="([a-z_]+)"[^}]*\} (\S+)$`)
	for _, m := range re.FindAllStringSubmatch(string(data), -1) {
		v, _ := strconv.ParseFloat(m[2], 64)
		out[m[1]] += v
	}
	return out
}

// resultJSON is a result document without what differs between runs of
// the same query: elapsed time, job state, id and job metadata.
func resultJSON(t *testing.T, v any) string {
	t.Helper()
	b, err := json.Marshal(v)
	if err != nil {
		t.Fatal(err)
	}
	var m map[string]any
	if err := json.Unmarshal(b, &m); err != nil {
		t.Fatal(err)
	}
	for _, k := range []string{"elapsed_seconds", "state", "id", "job"} {
		delete(m, k)
	}
	out, _ := json.Marshal(m)
	return string(out)
}

// faultCluster is the suite's processes.
type faultCluster struct {
	rs      *redistest.Server
	rdb     *redis.Client
	apiAddr string
	api     *proc
	workers []*proc
	metrics []string // metrics address of each worker, same index
}

func (fc *faultCluster) startAPI(t *testing.T) {
	t.Helper()
	fc.api = startProc(t, "serve", "--redis", fc.rs.URL(), "--workers", "0", "--http-addr", fc.apiAddr,
		"--grpc-addr", "127.0.0.1:0", "--lease-time", faultLease.String())
	fc.api.waitFor(t, regexp.MustCompile(`serving on (http://[0-9.:]+) `), 30*time.Second)
}

func (fc *faultCluster) startWorker(t *testing.T) {
	t.Helper()
	addr := freeAddr(t)
	w := startProc(t, "worker", "--redis", fc.rs.URL(), "--workers", "1", "--metrics-addr", addr,
		"--lease-time", faultLease.String(), "--shutdown-timeout", "2s")
	w.waitFor(t, regexp.MustCompile(`beliefd worker: 1 sampling goroutines`), 30*time.Second)
	fc.workers = append(fc.workers, w)
	fc.metrics = append(fc.metrics, addr)
}

// waitStatus polls url until it answers want, within d; it returns how
// long that took and the longest single call.
func waitStatus(t *testing.T, url string, want int, d time.Duration) (took, longest time.Duration) {
	t.Helper()
	hc := &http.Client{Timeout: faultCall}
	start := time.Now()
	for time.Since(start) < d {
		s := time.Now()
		resp, err := hc.Get(url)
		longest = max(longest, time.Since(s))
		if err == nil {
			io.Copy(io.Discard, resp.Body)
			resp.Body.Close()
			if resp.StatusCode == want {
				return time.Since(start), longest
			}
		}
		time.Sleep(100 * time.Millisecond)
	}
	t.Fatalf("%s did not answer %d within %s", url, want, d)
	return 0, 0
}

// --lease-time is checked at start.
func TestLeaseTimeFlag(t *testing.T) {
	for _, args := range [][]string{{"serve", "--lease-time", "50ms"}, {"worker", "--redis", "redis://127.0.0.1:1/0", "--lease-time", "0s"}} {
		code, _, errs := runCLI(t, args...)
		if code != 2 || !strings.Contains(errs, "--lease-time") {
			t.Errorf("%v: exit %d, stderr %q; want exit 2 naming --lease-time", args, code, errs)
		}
	}
	t.Setenv("BELIEFD_LEASE_TIME", "forever")
	if code, _, errs := runCLI(t, "serve"); code != 2 || !strings.Contains(errs, "BELIEFD_LEASE_TIME") {
		t.Errorf("BELIEFD_LEASE_TIME=forever: exit %d, stderr %q", code, errs)
	}
}

func TestFaultsScaleOut(t *testing.T) {
	if testing.Short() {
		t.Skip("starts Redis and five beliefd processes")
	}
	suiteStart := time.Now()
	if _, err := buildBinary(); err != nil {
		t.Fatal(err)
	}
	t.Logf("%6.2fs beliefd built", time.Since(suiteStart).Seconds())
	fc := &faultCluster{rs: redistest.StartServer(t, redistest.Options{AppendOnly: true})}
	fc.apiAddr = freeAddr(t)
	fc.rdb = redis.NewClient(&redis.Options{Addr: fc.rs.Addr(), DialTimeout: time.Second, ReadTimeout: time.Second, DisableIdentity: true})
	t.Cleanup(func() { fc.rdb.Close() })
	fc.startAPI(t)
	for range 3 {
		fc.startWorker(t)
	}
	c := newFaultClient("http://" + fc.apiAddr)

	nets := map[string]*model.Network{}
	_, tarnwick, err := examples.Load("tarnwick-platform")
	if err != nil {
		t.Fatal(err)
	}
	nets["tarnwick-platform"] = tarnwick
	for _, raw := range [][]byte{[]byte(chestClinic), positiveModelDoc()} {
		doc, err := model.DecodeBytes(raw)
		if err != nil {
			t.Fatal(err)
		}
		if nets[doc.Name], err = model.Compile(doc, model.Limits{}); err != nil {
			t.Fatal(err)
		}
		if status, data := c.call(t, "POST", "/v1/models", raw, 30*time.Second); status != http.StatusCreated && status != http.StatusOK {
			t.Fatalf("upload %s: %d %s", doc.Name, status, data)
		}
	}

	qs := faultQueries()
	if len(qs) != 50 {
		t.Fatalf("job mix has %d queries, want 50", len(qs))
	}
	ids := make([]string, len(qs))
	var idsMu sync.Mutex // guards ids and submitted for the watcher below
	submitted := 0
	submitWave := func(n int) []string {
		idsMu.Lock()
		defer idsMu.Unlock()
		for i := submitted; i < submitted+n; i++ {
			ids[i] = c.submit(t, qs[i])
		}
		submitted += n
		return append([]string(nil), ids[:submitted]...)
	}
	var faults []string
	// A watcher polls every submitted job all through the faults, as a
	// client would: it sees what the faults do to callers.
	var (
		watchStop  = make(chan struct{})
		watchDone  = make(chan struct{})
		watchCalls int
	)
	go func() {
		defer close(watchDone)
		for deadline := time.Now().Add(5 * time.Minute); time.Now().Before(deadline); {
			idsMu.Lock()
			watch := append([]string(nil), ids[:submitted]...)
			idsMu.Unlock()
			for _, id := range watch {
				select {
				case <-watchStop:
					return
				default:
				}
				status, _, err := c.once("GET", "/v1/jobs/"+id, nil)
				c.mu.Lock()
				watchCalls++
				if err != nil {
					c.retries["connection"]++
				} else if status == http.StatusServiceUnavailable {
					c.retries["503"]++
				}
				c.mu.Unlock()
			}
			select {
			case <-watchStop:
				return
			case <-time.After(20 * time.Millisecond):
			}
		}
	}()
	stopWatch := sync.OnceFunc(func() { close(watchStop); <-watchDone })
	t.Cleanup(stopWatch)
	phase := func(name string) { t.Logf("%6.2fs %s", time.Since(suiteStart).Seconds(), name) }
	var taken []heldUnit // units of stopped or killed workers, to be taken up by others

	phase("sigkill")
	// 1. SIGKILL a worker while it holds a lease; start a replacement.
	// Each fault pauses the other workers while the wave is submitted and
	// until the target holds a lease, so that the target has work.
	others := []*proc{fc.workers[1], fc.workers[2]}
	pause(t, others...)
	live := submitWave(14)
	u := freezeHolding(t, fc.rdb, fc.workers[0], live, nil)
	// The lease runs at most --lease-time from now (Redis's clock).
	if now, err := fc.rdb.Time(context.Background()).Result(); err != nil || u.expiry > now.UnixMilli()+faultLease.Milliseconds() {
		t.Errorf("lease of %+v ends at %d, beyond --lease-time %s from now %v (%v)", u, u.expiry, faultLease, now.UnixMilli(), err)
	}
	fc.workers[0].kill9(t)
	resume(t, others...)
	taken = append(taken, u)
	faults = append(faults, fmt.Sprintf("SIGKILL worker %d holding job %s block %d", fc.workers[0].cmd.Process.Pid, u.job, u.block))
	fc.startWorker(t)

	phase("sigstop")
	// 2. SIGSTOP a worker holding a lease and keep it stopped until other
	// workers have taken its unit up (possible only once the lease and the
	// skew margin are over) and finished the job, then SIGCONT it: it must
	// find its lease lost and commit nothing.
	stopped, stoppedMetrics := fc.workers[1], fc.metrics[1]
	others = []*proc{fc.workers[2], fc.workers[3]}
	pause(t, others...)
	live = submitWave(12)
	var before map[string]float64
	u = freezeHolding(t, fc.rdb, stopped, live, func() { before = blockOutcomes(t, stoppedMetrics) })
	resume(t, others...)
	stopAt := time.Now()
	for deadline := stopAt.Add(faultLease + redisstore.DefaultSkewMargin + 30*time.Second); !jobEndedAndDropped(t, fc.rdb, c, u); {
		if time.Now().After(deadline) {
			t.Fatalf("job of unit %+v of the stopped worker not finished by others within %s", u, time.Since(stopAt))
		}
		time.Sleep(20 * time.Millisecond)
	}
	stoppedFor := time.Since(stopAt)
	stopped.signal(t, syscall.SIGCONT)
	taken = append(taken, u)
	// The resumed worker's first outcome is that of its unit: lease lost
	// (lost_lease), or, if it noticed first that the job ended, cancelled.
	// A commit instead would show as no such outcome.
	var resumed map[string]float64
	for deadline := time.Now().Add(20 * time.Second); ; time.Sleep(20 * time.Millisecond) {
		after := blockOutcomes(t, stoppedMetrics)
		if after["lost_lease"]+after["cancelled"] > before["lost_lease"]+before["cancelled"] {
			resumed = map[string]float64{}
			for k, v := range after {
				if d := v - before[k]; d > 0 {
					resumed[k] = d
				}
			}
			break
		}
		if time.Now().After(deadline) {
			v, raw := c.getJob(t, u.job)
			resp, _ := http.Get("http://" + stoppedMetrics + "/metrics")
			var mtext []byte
			if resp != nil {
				mtext, _ = io.ReadAll(resp.Body)
				resp.Body.Close()
			}
			// SIGQUIT makes the worker print its goroutines, shown with its
			// output when the test fails.
			stopped.signal(t, syscall.SIGQUIT)
			time.Sleep(500 * time.Millisecond)
			t.Fatalf("resumed worker %d did not drop its unit %+v within 20s: outcomes just before it stopped %v, now %v; want one more lost_lease or cancelled\njob %s %s\nmetrics:\n%s", stopped.cmd.Process.Pid, u, before, after, v.State, raw, mtext)
		}
	}
	faults = append(faults, fmt.Sprintf("SIGSTOP worker %d for %.1fs holding job %s block %d (outcomes on resuming %v)",
		stopped.cmd.Process.Pid, stoppedFor.Seconds(), u.job, u.block, resumed))
	phase("redis restart")
	// 3. Restart Redis (same port and data directory) while a worker is in
	// the middle of a unit: the worker resumes while Redis is down, so its
	// commit fails and the unit waits for its lease to run out.
	w := fc.workers[2]
	others = []*proc{fc.workers[1], fc.workers[3]}
	pause(t, others...)
	live = submitWave(12)
	freezeHolding(t, fc.rdb, w, live, nil)
	resume(t, others...)
	restartAt := time.Now()
	fc.rs.Stop()
	w.signal(t, syscall.SIGCONT)
	time.Sleep(time.Second)
	fc.rs.StartAgain()
	faults = append(faults, fmt.Sprintf("Redis down %.2fs (stopped, started on the same port and data directory) with a unit in flight", time.Since(restartAt).Seconds()))

	phase("api restart")
	// 4. Restart the API process (SIGKILL, then start it on the same port)
	// while a worker is in the middle of a unit.
	w = fc.workers[3]
	others = []*proc{fc.workers[1], fc.workers[2]}
	pause(t, others...)
	live = submitWave(12)
	freezeHolding(t, fc.rdb, w, live, nil)
	resume(t, others...)
	restartAt = time.Now()
	fc.api.kill9(t)
	fc.startAPI(t)
	w.signal(t, syscall.SIGCONT)
	faults = append(faults, fmt.Sprintf("API restart in %.2fs with a unit in flight", time.Since(restartAt).Seconds()))

	phase("wait for jobs")
	// Every job finishes.
	views := make([]faultJobView, len(ids))
	raws := make([][]byte, len(ids))
	pending := map[int]bool{}
	for i := range ids {
		pending[i] = true
	}
	for deadline := time.Now().Add(faultFinish); len(pending) > 0; {
		for i := range pending {
			views[i], raws[i] = c.getJob(t, ids[i])
			if s := views[i].State; s == "succeeded" || s == "failed" || s == "cancelled" {
				delete(pending, i)
			}
		}
		if len(pending) == 0 {
			break
		}
		if time.Now().After(deadline) {
			var left []string
			for i := range pending {
				left = append(left, fmt.Sprintf("%s (%s, %d/%d blocks)", ids[i], views[i].State, views[i].Job.MergedBlocks, views[i].Job.Blocks))
			}
			t.Fatalf("%d jobs unfinished %s after the last fault: %s", len(pending), faultFinish, strings.Join(left, ", "))
		}
		time.Sleep(200 * time.Millisecond)
	}

	phase("references")
	stopWatch()

	// The same queries in this process: the reference answers.
	want := make([]*infer.Result, len(qs))
	var wg sync.WaitGroup
	errs := make([]error, len(qs))
	next := make(chan int)
	for range 2 {
		wg.Add(1)
		go func() {
			defer wg.Done()
			runner := infer.NewRunner(infer.Options{Workers: 1})
			for i := range next {
				want[i], errs[i] = runner.Run(context.Background(), nets[qs[i].Model], qs[i], nil)
			}
		}()
	}
	for i := range qs {
		next <- i
	}
	close(next)
	wg.Wait()

	byState := map[string]int{}
	var slowest time.Duration
	slowestID := ""
	for i, v := range views {
		byState[v.State]++
		if v.State != "succeeded" {
			t.Errorf("job %s (%s %s): %s: %s", ids[i], qs[i].Method, qs[i].Model, v.State, v.Job.Error)
			continue
		}
		if d := v.Job.FinishedAt.Sub(v.Job.CreatedAt); d > slowest {
			slowest, slowestID = d, ids[i]
		}
		if errs[i] != nil {
			t.Errorf("reference run of job %s: %v", ids[i], errs[i])
			continue
		}
		if n := qs[i].Stop.MaxSamples; n > 0 && v.Samples != n {
			t.Errorf("job %s (%s %s) drew %d samples, want exactly %d", ids[i], qs[i].Method, qs[i].Model, v.Samples, n)
		}
		var got map[string]any
		if err := json.Unmarshal(raws[i], &got); err != nil {
			t.Fatal(err)
		}
		if g, w := resultJSON(t, got), resultJSON(t, want[i]); g != w {
			t.Errorf("job %s (%s %s) differs from the single-process run:\nservice %s\nrun     %s", ids[i], qs[i].Method, qs[i].Model, g, w)
		}
	}
	// The killed and the stopped worker's units were finished by others:
	// their jobs succeeded with every block merged.
	reclaimed := 0
	for _, u := range taken {
		for i, id := range ids {
			if id == u.job && views[i].State == "succeeded" {
				reclaimed++
			}
		}
	}
	if reclaimed != len(taken) {
		t.Errorf("%d of the %d units held by the killed and the stopped worker were finished by others", reclaimed, len(taken))
	}

	// Outcomes reported by the worker processes still running (the killed
	// one's counters died with it).
	outcomes := map[string]float64{}
	for i, addr := range fc.metrics {
		if i == 0 {
			continue
		}
		for k, v := range blockOutcomes(t, addr) {
			outcomes[k] += v
		}
	}
	c.mu.Lock()
	for status := range c.statuses {
		if status >= 500 && status != http.StatusServiceUnavailable {
			t.Errorf("the API answered %d %d times during the faults; only 503 may come from a fault", status, c.statuses[status])
		}
	}
	retries := c.retries["connection"] + c.retries["503"]
	tally := fmt.Sprintf("fault suite tally (%d jobs, %.1fs so far):\n", len(ids), time.Since(suiteStart).Seconds())
	states := make([]string, 0, len(byState))
	for s, n := range byState {
		states = append(states, fmt.Sprintf("%s %d", s, n))
	}
	sort.Strings(states)
	tally += "  jobs by state:      " + strings.Join(states, ", ") + "\n"
	tally += "  faults:             " + strings.Join(faults, "; ") + "\n"
	tally += fmt.Sprintf("  blocks reclaimed:   %d (units held by the killed and the stopped worker, finished by others)\n", reclaimed)
	// Every job here ends by max_samples and none is cancelled, so a unit
	// dropped because its job had ended lost its lease too.
	tally += fmt.Sprintf("  lost leases:        %.0f (units of live workers that found their lease gone: %.0f lost_lease, %.0f after the job had ended; %.0f units committed)\n",
		outcomes["lost_lease"]+outcomes["cancelled"], outcomes["lost_lease"], outcomes["cancelled"], outcomes["committed"])
	tally += fmt.Sprintf("  client retries:     %d (%d connection errors, %d answers 503, of %d watcher calls and the test's own); statuses seen %v\n",
		retries, c.retries["connection"], c.retries["503"], watchCalls, c.statuses)
	tally += fmt.Sprintf("  max time to finish: %.2fs (job %s, from creation)\n", slowest.Seconds(), slowestID)
	c.mu.Unlock()
	t.Log(tally)

	phase("outage")
	// 5. Redis outage: readiness turns 503 at once, calls fail fast with
	// 503 UNAVAILABLE, and everything is ready again once Redis is back.
	fc.rs.Stop()
	took, longest := waitStatus(t, c.base+"/readyz", http.StatusServiceUnavailable, readyWithin)
	t.Logf("redis down: API /readyz 503 after %s (longest call %s)", took, longest)
	for _, addr := range fc.metrics[1:] {
		waitStatus(t, "http://"+addr+"/readyz", http.StatusServiceUnavailable, readyWithin)
	}
	body, _ := json.Marshal(qs[0])
	for _, call := range []struct{ method, path string }{{"GET", "/v1/jobs/" + ids[0]}, {"POST", "/v1/jobs"}, {"GET", "/v1/models"}} {
		var b []byte
		if call.method == "POST" {
			b = body
		}
		s := time.Now()
		status, data, err := c.once(call.method, call.path, b)
		d := time.Since(s)
		if err != nil {
			t.Fatalf("%s %s while Redis is down: %v after %s", call.method, call.path, err, d)
		}
		var e struct {
			Error struct {
				Status  int    `json:"status"`
				Code    string `json:"code"`
				Reason  string `json:"reason"`
				Message string `json:"message"`
			} `json:"error"`
		}
		_ = json.Unmarshal(data, &e)
		if status != http.StatusServiceUnavailable || e.Error.Code != "UNAVAILABLE" || e.Error.Reason != "UNAVAILABLE" || e.Error.Message == "" || d > failFast {
			t.Errorf("%s %s while Redis is down: %d %s after %s; want 503 UNAVAILABLE with a message within %s", call.method, call.path, status, data, d, failFast)
		} else {
			t.Logf("redis down: %s %s answered %d %s %q in %s", call.method, call.path, status, e.Error.Code, e.Error.Message, d.Round(time.Millisecond))
		}
	}
	fc.rs.StartAgain()
	took, _ = waitStatus(t, c.base+"/readyz", http.StatusOK, reconnectWithin)
	t.Logf("redis back: API /readyz 200 after %s", took)
	for _, addr := range fc.metrics[1:] {
		waitStatus(t, "http://"+addr+"/readyz", http.StatusOK, reconnectWithin)
	}
	// The workers take new work again.
	seed := uint64(99)
	q := &infer.Query{Model: "chest-clinic", Evidence: map[string]string{"xray": "yes"}, Method: infer.MethodLikelihoodWeighting,
		Stop: infer.StopRule{MaxSamples: 3*8192 + 1}, Seed: &seed}
	id := c.submit(t, q)
	var v faultJobView
	var raw []byte
	for deadline := time.Now().Add(60 * time.Second); v.State != "succeeded"; time.Sleep(100 * time.Millisecond) {
		if v, raw = c.getJob(t, id); v.State == "failed" || v.State == "cancelled" || time.Now().After(deadline) {
			t.Fatalf("job after the outage: %s %s", v.State, v.Job.Error)
		}
	}
	ref, err := infer.NewRunner(infer.Options{}).Run(context.Background(), nets["chest-clinic"], q, nil)
	if err != nil {
		t.Fatal(err)
	}
	var got map[string]any
	json.Unmarshal(raw, &got)
	if v.Samples != q.Stop.MaxSamples || resultJSON(t, got) != resultJSON(t, ref) {
		t.Errorf("job after the outage: %d samples, result %s; want %d samples, result %s", v.Samples, resultJSON(t, got), q.Stop.MaxSamples, resultJSON(t, ref))
	}
	t.Logf("fault suite done in %.1fs", time.Since(suiteStart).Seconds())
}
