package main

import (
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"io"
	"math/rand/v2"
	"net/http"
	"slices"
	"sort"
	"strings"
	"sync"
	"time"
)

// Bounds of the load command's settings.
const (
	maxClients  = 4096
	maxDuration = time.Hour
)

func cmdLoad(ctx context.Context, args []string, stdout io.Writer) error {
	fs := flag.NewFlagSet("load", flag.ContinueOnError)
	fs.SetOutput(stdout)
	base := fs.String("url", "http://127.0.0.1:8080", "base URL of the beliefd HTTP API")
	clients := fs.Int("clients", 64, "concurrent clients")
	duration := fs.Duration("duration", 10*time.Second, "how long the clients submit")
	samples := fs.Int64("samples", 4096, "max_samples of each likelihood-weighting job")
	modelName := fs.String("model", "tarnwick-platform", "model of the jobs (needs alarm_checkout_5xx, bad_deploy and orders_db, as the example has)")
	allowRemote := fs.Bool("allow-remote", false, "allow a --url that is not a loopback address")
	if err := fs.Parse(args); err != nil {
		return err
	}
	switch {
	case fs.NArg() > 0:
		return fmt.Errorf("%w: unexpected argument %q", errUsage, fs.Arg(0))
	case *clients < 1 || *clients > maxClients:
		return fmt.Errorf("%w: --clients %d: want 1 to %d", errUsage, *clients, maxClients)
	case *duration <= 0 || *duration > maxDuration:
		return fmt.Errorf("%w: --duration %s: want more than 0 and at most %s", errUsage, *duration, maxDuration)
	case *samples < 1:
		return fmt.Errorf("%w: --samples %d: want at least 1", errUsage, *samples)
	}
	if err := checkTarget(*base, *allowRemote); err != nil {
		return err
	}
	c := newClient(*base, *clients)
	if status, _, err := c.do("GET", "/readyz", nil); err != nil || status != http.StatusOK {
		return fmt.Errorf("%s/readyz: status %d, %v", *base, status, err)
	}
	r := runLoad(ctx, c, *clients, *duration, *modelName, *samples)
	r.print(stdout, *clients)
	return nil
}

// loadResult is what the clients saw.
type loadResult struct {
	mu        sync.Mutex
	elapsed   time.Duration
	latencies map[string][]time.Duration
	statuses  map[string]map[int]int
	errors    map[string]int
	accepted  int
	succeeded int
	failed    int
	depths    []float64
}

func (r *loadResult) record(kind string, status int, d time.Duration) {
	r.mu.Lock()
	defer r.mu.Unlock()
	r.latencies[kind] = append(r.latencies[kind], d)
	if r.statuses[kind] == nil {
		r.statuses[kind] = map[int]int{}
	}
	r.statuses[kind][status]++
}

func (r *loadResult) transportError(err error) {
	r.mu.Lock()
	defer r.mu.Unlock()
	msg := err.Error()
	if i := strings.LastIndex(msg, ": "); i >= 0 {
		msg = msg[i+2:]
	}
	r.errors[msg]++
}

func runLoad(ctx context.Context, c *client, clients int, duration time.Duration, modelName string, samples int64) *loadResult {
	r := &loadResult{latencies: map[string][]time.Duration{}, statuses: map[string]map[int]int{}, errors: map[string]int{}}
	start := time.Now()
	ctx, cancel := context.WithDeadline(ctx, start.Add(duration))
	defer cancel()
	done := make(chan struct{})
	go func() {
		defer close(done)
		t := time.NewTicker(250 * time.Millisecond)
		defer t.Stop()
		for {
			select {
			case <-ctx.Done():
				return
			case <-t.C:
			}
			if d, err := c.queueDepth(); err == nil {
				r.mu.Lock()
				r.depths = append(r.depths, d)
				r.mu.Unlock()
			}
		}
	}()
	var wg sync.WaitGroup
	for i := range clients {
		wg.Add(1)
		go func() {
			defer wg.Done()
			loadClient(ctx, c, r, rand.New(rand.NewPCG(uint64(i), uint64(start.UnixNano()))), modelName, samples)
		}()
	}
	wg.Wait()
	r.elapsed = time.Since(start)
	<-done
	return r
}

// loadClient submits small jobs and polls each until it ends, until ctx
// ends; on 429 it waits 5 to 25ms and tries again.
func loadClient(ctx context.Context, c *client, r *loadResult, rng *rand.Rand, modelName string, samples int64) {
	timed := func(kind, method, path string, body []byte) (int, []byte, bool) {
		s := time.Now()
		status, data, err := c.do(method, path, body)
		if err != nil {
			if ctx.Err() == nil {
				r.transportError(err)
			}
			return 0, nil, false
		}
		r.record(kind, status, time.Since(s))
		return status, data, true
	}
	sleep := func(d time.Duration) bool {
		select {
		case <-ctx.Done():
			return false
		case <-time.After(d):
			return true
		}
	}
	for n := 0; n < 10_000_000 && ctx.Err() == nil; n++ {
		q := map[string]any{
			"model": modelName, "evidence": map[string]string{"alarm_checkout_5xx": "firing"},
			"targets": []string{"bad_deploy", "orders_db"}, "method": "likelihood-weighting",
			"stop": map[string]any{"max_samples": samples}, "seed": rng.Uint64() >> 11,
		}
		if rng.IntN(4) == 0 {
			q["method"] = "exact"
			delete(q, "stop")
		}
		body, _ := json.Marshal(q)
		status, data, ok := timed("submit", "POST", "/v1/jobs", body)
		if !ok {
			if !sleep(10 * time.Millisecond) {
				return
			}
			continue
		}
		if status != http.StatusAccepted {
			if !sleep(time.Duration(5+rng.IntN(20)) * time.Millisecond) {
				return
			}
			continue
		}
		var v jobView
		_ = json.Unmarshal(data, &v)
		r.mu.Lock()
		r.accepted++
		r.mu.Unlock()
		for k := 0; k < 1_000_000; k++ {
			if !sleep(20 * time.Millisecond) {
				return
			}
			status, data, ok := timed("poll", "GET", "/v1/jobs/"+v.ID, nil)
			if !ok || status != http.StatusOK {
				continue
			}
			var jv jobView
			_ = json.Unmarshal(data, &jv)
			if jv.ended() {
				r.mu.Lock()
				if jv.State == "succeeded" {
					r.succeeded++
				} else {
					r.failed++
				}
				r.mu.Unlock()
				break
			}
		}
	}
}

// quantile is the p-quantile of sorted durations, nearest rank.
func quantile(sorted []time.Duration, p float64) time.Duration {
	if len(sorted) == 0 {
		return 0
	}
	i := int(p*float64(len(sorted))+0.5) - 1
	return sorted[min(max(i, 0), len(sorted)-1)]
}

func (r *loadResult) print(w io.Writer, clients int) {
	r.mu.Lock()
	defer r.mu.Unlock()
	fmt.Fprintf(w, "%d clients for %s\n", clients, r.elapsed.Round(time.Millisecond))
	var all []time.Duration
	for _, k := range []string{"submit", "poll"} {
		l := slices.Clone(r.latencies[k])
		slices.Sort(l)
		all = append(all, l...)
		var codes []string
		for c, n := range r.statuses[k] {
			codes = append(codes, fmt.Sprintf("%d: %d", c, n))
		}
		sort.Strings(codes)
		fmt.Fprintf(w, "  %-6s %8d requests  p50 %-10s p99 %-10s statuses {%s}\n", k, len(l),
			quantile(l, 0.5).Round(time.Microsecond), quantile(l, 0.99).Round(time.Microsecond), strings.Join(codes, ", "))
	}
	slices.Sort(all)
	fmt.Fprintf(w, "  all    %8d requests  %.0f requests/s  p50 %s  p99 %s\n", len(all), float64(len(all))/r.elapsed.Seconds(),
		quantile(all, 0.5).Round(time.Microsecond), quantile(all, 0.99).Round(time.Microsecond))
	fmt.Fprintf(w, "  jobs   %d accepted (%.1f/s), %d seen succeeded, %d seen failed\n", r.accepted, float64(r.accepted)/r.elapsed.Seconds(), r.succeeded, r.failed)
	if len(r.errors) > 0 {
		fmt.Fprintf(w, "  transport errors %v\n", r.errors)
	}
	if len(r.depths) > 0 {
		mx, sum := 0.0, 0.0
		for _, d := range r.depths {
			mx, sum = max(mx, d), sum+d
		}
		fmt.Fprintf(w, "  queue depth (beliefd_queue_depth, %d reads) mean %.1f max %.0f\n", len(r.depths), sum/float64(len(r.depths)), mx)
	}
}
