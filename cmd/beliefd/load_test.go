package main

// The load test: many clients submit small jobs and poll them for a fixed
// time against `beliefd serve` with a small --max-jobs, so that the queue
// is full most of the time. The service must shed the excess with 429
// (never 5xx, never a dropped connection), keep its queue within the cap
// and its memory within a bound, and take work again once the load stops.

import (
	"bufio"
	"bytes"
	"encoding/json"
	"fmt"
	"io"
	"math/rand/v2"
	"net/http"
	"os"
	"regexp"
	"slices"
	"sort"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"
)

// Shape of the load.
const (
	loadClients  = 64
	loadDuration = 10 * time.Second
	loadMaxJobs  = 8
	// loadRetention keeps finished jobs briefly, so that memory reflects
	// the load and not the history (the least --retention allowed is 1s).
	loadRetention = 2 * time.Second
	// loadSampleEvery is how often queue depth and RSS are read.
	loadSampleEvery = 200 * time.Millisecond
)

// RSS bound: the RSS before the load plus twice (the garbage collector's
// default target, GOGC=100, lets the heap reach twice the live data) the
// live data the load can justify:
//   - job records alive at once: at most --max-jobs unfinished plus those
//     finished within --retention (expired records are dropped at the next
//     store access), counted as the measured acceptance rate times the
//     retention plus one second, at 40 kB each: a finished record takes
//     about 10 kB in Redis, 1.35 x its 7.6 kB JSON (worker/redisstore/doc.go),
//     and its Go structures (maps of intervals) are allowed 4x that;
//   - per client connection 256 kB: the server's 4 kB read and write
//     buffers, a goroutine stack of at most a few tens of kB, and request
//     and response bodies of a few kB.
//
// Memory that grew with the number of requests or jobs served rather than
// with the jobs alive (a leak) would pass it only for short runs; the
// records' expiry itself is checked directly after the load.
const (
	loadRecordBytes = 40 << 10
	loadConnBytes   = 256 << 10
)

// loadStats collects what the clients see.
type loadStats struct {
	mu        sync.Mutex
	latencies map[string][]time.Duration // by request kind: submit, poll
	statuses  map[string]map[int]int     // by kind, status
	errors    map[string]int             // transport errors by message class
	bad429    int                        // 429 answers without the RESOURCE_EXHAUSTED code
	accepted  int
	firstID   string // the first job accepted
	succeeded int
	failed    int
}

func (s *loadStats) record(kind string, status int, d time.Duration) {
	s.mu.Lock()
	defer s.mu.Unlock()
	s.latencies[kind] = append(s.latencies[kind], d)
	if s.statuses[kind] == nil {
		s.statuses[kind] = map[int]int{}
	}
	s.statuses[kind][status]++
}

func (s *loadStats) transportError(err error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	msg := err.Error()
	if i := strings.LastIndex(msg, ": "); i >= 0 {
		msg = msg[i+2:]
	}
	s.errors[msg]++
}

// percentile is the p-quantile (0..1) of sorted durations, nearest rank.
func percentile(sorted []time.Duration, p float64) time.Duration {
	if len(sorted) == 0 {
		return 0
	}
	i := int(p*float64(len(sorted))+0.5) - 1
	return sorted[min(max(i, 0), len(sorted)-1)]
}

// rssBytes reads VmRSS of a process from /proc/PID/status.
func rssBytes(pid int) (int64, error) {
	f, err := os.Open(fmt.Sprintf("/proc/%d/status", pid))
	if err != nil {
		return 0, err
	}
	defer f.Close()
	sc := bufio.NewScanner(f)
	for sc.Scan() {
		if rest, ok := strings.CutPrefix(sc.Text(), "VmRSS:"); ok {
			f := strings.Fields(rest) // "123456 kB"
			if len(f) == 2 && f[1] == "kB" {
				kb, err := strconv.ParseInt(f[0], 10, 64)
				return kb << 10, err
			}
		}
	}
	return 0, fmt.Errorf("no VmRSS in /proc/%d/status", pid)
}

var queueDepthRe = regexp.MustCompile(`(?m)^beliefd_queue_depth (\S+)$`)

// queueDepth reads beliefd_queue_depth from /metrics.
func queueDepth(hc *http.Client, base string) (float64, error) {
	resp, err := hc.Get(base + "/metrics")
	if err != nil {
		return 0, err
	}
	defer resp.Body.Close()
	data, err := io.ReadAll(resp.Body)
	if err != nil {
		return 0, err
	}
	m := queueDepthRe.FindSubmatch(data)
	if m == nil {
		return 0, fmt.Errorf("no beliefd_queue_depth in /metrics")
	}
	return strconv.ParseFloat(string(m[1]), 64)
}

// loadQuery is one small job: one block of likelihood weighting, or exact
// inference, on the example model.
func loadQuery(rng *rand.Rand) []byte {
	q := map[string]any{
		"model":    "tarnwick-platform",
		"evidence": map[string]string{"alarm_checkout_5xx": "firing"},
		"targets":  []string{"bad_deploy", "orders_db"},
		"method":   "likelihood-weighting",
		"stop":     map[string]any{"max_samples": 4096},
		"seed":     rng.Uint64() >> 11,
	}
	if rng.IntN(4) == 0 {
		q["method"] = "exact"
		delete(q, "stop")
	}
	b, _ := json.Marshal(q)
	return b
}

func TestLoadShedsAndRecovers(t *testing.T) {
	if testing.Short() {
		t.Skip("runs a 10s load against a beliefd process")
	}
	p := startProc(t, "serve", "--http-addr", "127.0.0.1:0", "--grpc-addr", "127.0.0.1:0",
		"--max-jobs", strconv.Itoa(loadMaxJobs), "--retention", loadRetention.String(), "--workers", "2")
	base := p.waitFor(t, regexp.MustCompile(`serving on (http://[0-9.:]+) `), 30*time.Second)[1]
	pid := p.cmd.Process.Pid
	hc := &http.Client{Timeout: 10 * time.Second, Transport: &http.Transport{MaxIdleConnsPerHost: loadClients}}

	baseRSS, err := rssBytes(pid)
	if err != nil {
		t.Fatal(err)
	}

	st := &loadStats{latencies: map[string][]time.Duration{}, statuses: map[string]map[int]int{}, errors: map[string]int{}}
	start := time.Now()
	deadline := start.Add(loadDuration)

	// Queue depth and RSS, sampled all along.
	var depths []float64
	var rssMax int64
	samplerDone := make(chan struct{})
	go func() {
		defer close(samplerDone)
		for time.Now().Before(deadline) {
			if d, err := queueDepth(hc, base); err == nil {
				depths = append(depths, d)
			}
			if r, err := rssBytes(pid); err == nil {
				rssMax = max(rssMax, r)
			}
			time.Sleep(loadSampleEvery)
		}
	}()

	var wg sync.WaitGroup
	for c := range loadClients {
		wg.Add(1)
		go func() {
			defer wg.Done()
			rng := rand.New(rand.NewPCG(uint64(c), 99))
			do := func(kind, method, url string, body []byte) (int, []byte, bool) {
				var r io.Reader
				if body != nil {
					r = bytes.NewReader(body)
				}
				req, _ := http.NewRequest(method, url, r)
				s := time.Now()
				resp, err := hc.Do(req)
				if err != nil {
					st.transportError(err)
					return 0, nil, false
				}
				data, err := io.ReadAll(resp.Body)
				resp.Body.Close()
				if err != nil {
					st.transportError(err)
					return 0, nil, false
				}
				st.record(kind, resp.StatusCode, time.Since(s))
				return resp.StatusCode, data, true
			}
			for n := 0; n < 100_000 && time.Now().Before(deadline); n++ {
				status, data, ok := do("submit", "POST", base+"/v1/jobs", loadQuery(rng))
				if !ok {
					time.Sleep(10 * time.Millisecond)
					continue
				}
				if status == http.StatusTooManyRequests {
					if !bytes.Contains(data, []byte(`"RESOURCE_EXHAUSTED"`)) {
						st.mu.Lock()
						st.bad429++
						st.mu.Unlock()
					}
					time.Sleep(time.Duration(5+rng.IntN(20)) * time.Millisecond)
					continue
				}
				if status != http.StatusAccepted {
					continue
				}
				var v struct {
					ID string `json:"id"`
				}
				json.Unmarshal(data, &v)
				st.mu.Lock()
				st.accepted++
				if st.firstID == "" {
					st.firstID = v.ID
				}
				st.mu.Unlock()
				// Poll the job until it ends (or the load does).
				for k := 0; k < 10_000 && time.Now().Before(deadline); k++ {
					time.Sleep(20 * time.Millisecond)
					status, data, ok := do("poll", "GET", base+"/v1/jobs/"+v.ID, nil)
					if !ok || status != http.StatusOK {
						continue
					}
					var jv struct {
						State string `json:"state"`
					}
					json.Unmarshal(data, &jv)
					if jv.State == "succeeded" || jv.State == "failed" || jv.State == "cancelled" {
						st.mu.Lock()
						if jv.State == "succeeded" {
							st.succeeded++
						} else {
							st.failed++
						}
						st.mu.Unlock()
						break
					}
				}
			}
		}()
	}
	wg.Wait()
	elapsed := time.Since(start)
	<-samplerDone

	// After the load: the queue drains and a new submission is accepted
	// and completes.
	rng := rand.New(rand.NewPCG(7, 7))
	var recoverID string
	recoverStart := time.Now()
	for attempt := 0; recoverID == "" && attempt < 300; attempt++ {
		resp, err := hc.Post(base+"/v1/jobs", "application/json", bytes.NewReader(loadQuery(rng)))
		if err != nil {
			t.Fatalf("submit after the load: %v", err)
		}
		data, _ := io.ReadAll(resp.Body)
		resp.Body.Close()
		switch resp.StatusCode {
		case http.StatusAccepted:
			var v struct {
				ID string `json:"id"`
			}
			json.Unmarshal(data, &v)
			recoverID = v.ID
		case http.StatusTooManyRequests:
			time.Sleep(100 * time.Millisecond)
		default:
			t.Fatalf("submit after the load: %d %s", resp.StatusCode, data)
		}
	}
	if recoverID == "" {
		t.Fatalf("no submission accepted within 300 tries (30s) after the load stopped")
	}
	recoverState := ""
	for attempt := 0; attempt < 600; attempt++ {
		resp, err := hc.Get(base + "/v1/jobs/" + recoverID)
		if err != nil {
			t.Fatal(err)
		}
		var v struct {
			State string `json:"state"`
		}
		json.NewDecoder(resp.Body).Decode(&v)
		resp.Body.Close()
		if recoverState = v.State; recoverState == "succeeded" || recoverState == "failed" || recoverState == "cancelled" {
			break
		}
		time.Sleep(50 * time.Millisecond)
	}
	if recoverState != "succeeded" {
		t.Errorf("job submitted after the load: state %q, want succeeded", recoverState)
	}
	recovered := time.Since(recoverStart)
	rssAfter, _ := rssBytes(pid)

	// The first job accepted finished long before the load ended; once the
	// retention has passed since then its record must be gone.
	st.mu.Lock()
	firstID := st.firstID
	rate := float64(st.accepted) / elapsed.Seconds()
	st.mu.Unlock()
	live := float64(loadMaxJobs) + rate*(loadRetention+time.Second).Seconds()
	rssBound := baseRSS + int64(2*(live*loadRecordBytes+loadClients*loadConnBytes))
	expiredStatus := 0
	if firstID != "" {
		time.Sleep(time.Until(start.Add(loadRetention + time.Second)))
		for attempt := 0; attempt < 100; attempt++ {
			resp, err := hc.Get(base + "/v1/jobs/" + firstID)
			if err != nil {
				t.Fatal(err)
			}
			io.Copy(io.Discard, resp.Body)
			resp.Body.Close()
			if expiredStatus = resp.StatusCode; expiredStatus == http.StatusNotFound {
				break
			}
			time.Sleep(100 * time.Millisecond)
		}
	}

	// Report.
	st.mu.Lock()
	defer st.mu.Unlock()
	total := 0
	var all []time.Duration
	kinds := []string{"submit", "poll"}
	report := fmt.Sprintf("load: %d clients for %s against serve --max-jobs %d --workers 2 --retention %s\n", loadClients, elapsed.Round(time.Millisecond), loadMaxJobs, loadRetention)
	for _, k := range kinds {
		l := slices.Clone(st.latencies[k])
		slices.Sort(l)
		all = append(all, l...)
		total += len(l)
		codes := make([]string, 0, len(st.statuses[k]))
		for c, n := range st.statuses[k] {
			codes = append(codes, fmt.Sprintf("%d: %d", c, n))
		}
		sort.Strings(codes)
		report += fmt.Sprintf("  %-6s %7d requests  p50 %-10s p99 %-10s statuses {%s}\n", k, len(l), percentile(l, 0.5).Round(time.Microsecond), percentile(l, 0.99).Round(time.Microsecond), strings.Join(codes, ", "))
	}
	slices.Sort(all)
	report += fmt.Sprintf("  all    %7d requests  %.0f requests/s  p50 %s  p99 %s\n", total, float64(total)/elapsed.Seconds(), percentile(all, 0.5).Round(time.Microsecond), percentile(all, 0.99).Round(time.Microsecond))
	report += fmt.Sprintf("  jobs: %d accepted (%.0f/s), %d seen succeeded, %d failed; transport errors %v\n", st.accepted, float64(st.accepted)/elapsed.Seconds(), st.succeeded, st.failed, st.errors)
	maxDepth, sumDepth := 0.0, 0.0
	for _, d := range depths {
		maxDepth = max(maxDepth, d)
		sumDepth += d
	}
	meanDepth := 0.0
	if len(depths) > 0 {
		meanDepth = sumDepth / float64(len(depths))
	}
	report += fmt.Sprintf("  queue depth (beliefd_queue_depth, %d reads): mean %.1f, max %.0f (cap %d)\n", len(depths), meanDepth, maxDepth, loadMaxJobs)
	report += fmt.Sprintf("  RSS: %.1f MiB before, %.1f MiB at most during, %.1f MiB after; bound %.1f MiB (%.0f records alive at most)\n", mib(baseRSS), mib(rssMax), mib(rssAfter), mib(rssBound), live)
	report += fmt.Sprintf("  retention: the first job's record answers %d once %s has passed\n", expiredStatus, loadRetention)
	report += fmt.Sprintf("  recovery: a new job accepted and succeeded %s after the load stopped\n", recovered.Round(time.Millisecond))
	t.Log(report)

	for _, k := range kinds {
		for c, n := range st.statuses[k] {
			if c >= 500 {
				t.Errorf("%d %s requests answered %d", n, k, c)
			}
		}
	}
	if len(st.errors) > 0 {
		t.Errorf("transport errors under load: %v", st.errors)
	}
	if st.statuses["submit"][http.StatusTooManyRequests] == 0 {
		t.Errorf("no submission got 429: the load did not fill the queue of %d, so shedding was not tested", loadMaxJobs)
	}
	if st.bad429 > 0 {
		t.Errorf("%d answers 429 without the RESOURCE_EXHAUSTED code", st.bad429)
	}
	if st.statuses["submit"][http.StatusAccepted] == 0 || st.succeeded == 0 {
		t.Errorf("no job accepted and finished under load: %v, %d succeeded", st.statuses["submit"], st.succeeded)
	}
	if st.failed > 0 {
		t.Errorf("%d jobs failed under load", st.failed)
	}
	if maxDepth > loadMaxJobs {
		t.Errorf("queue depth reached %.0f, beyond --max-jobs %d", maxDepth, loadMaxJobs)
	}
	if len(depths) == 0 {
		t.Errorf("no queue depth read from /metrics")
	}
	if firstID != "" && expiredStatus != http.StatusNotFound {
		t.Errorf("the first job's record answers %d after its retention of %s; want 404 (expired)", expiredStatus, loadRetention)
	}
	if rssMax > rssBound {
		t.Errorf("RSS reached %.1f MiB, beyond the bound of %.1f MiB", mib(rssMax), mib(rssBound))
	}
}

func mib(b int64) float64 { return float64(b) / (1 << 20) }
