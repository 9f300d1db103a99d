package main

import (
	"bufio"
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"net"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/examples"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/worker/redisstore/redistest"
)

// buildBinary builds the beliefd command once per test binary.
var buildBinary = sync.OnceValues(func() (string, error) {
	dir, err := os.MkdirTemp("", "beliefd-bin")
	if err != nil {
		return "", err
	}
	bin := filepath.Join(dir, "beliefd")
	out, err := exec.Command("go", "build", "-o", bin, ".").CombinedOutput()
	if err != nil {
		return "", fmt.Errorf("go build: %v\n%s", err, out)
	}
	return bin, nil
})

// proc is a beliefd process started by a test; it is killed at cleanup.
type proc struct {
	cmd  *exec.Cmd
	out  *bytes.Buffer
	mu   *sync.Mutex
	done chan error
}

type syncWriter struct {
	mu *sync.Mutex
	w  io.Writer
}

func (s syncWriter) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.w.Write(p)
}

func startProc(t *testing.T, args ...string) *proc {
	t.Helper()
	bin, err := buildBinary()
	if err != nil {
		t.Fatal(err)
	}
	p := &proc{out: &bytes.Buffer{}, mu: &sync.Mutex{}, done: make(chan error, 1)}
	p.cmd = exec.Command(bin, args...)
	p.cmd.Stdout = syncWriter{p.mu, p.out}
	p.cmd.Stderr = syncWriter{p.mu, p.out}
	if err := p.cmd.Start(); err != nil {
		t.Fatal(err)
	}
	go func() { p.done <- p.cmd.Wait() }()
	t.Cleanup(func() {
		p.cmd.Process.Kill()
		<-p.done
		if t.Failed() {
			t.Logf("output of beliefd %s:\n%s", strings.Join(args, " "), p.output())
		}
	})
	return p
}

func (p *proc) output() string { p.mu.Lock(); defer p.mu.Unlock(); return p.out.String() }

// waitFor polls the process output for a regular expression.
func (p *proc) waitFor(t *testing.T, re *regexp.Regexp, within time.Duration) []string {
	t.Helper()
	deadline := time.Now().Add(within)
	for time.Now().Before(deadline) {
		if m := re.FindStringSubmatch(p.output()); m != nil {
			return m
		}
		select {
		case err := <-p.done:
			t.Fatalf("process exited early (%v):\n%s", err, p.output())
		case <-time.After(50 * time.Millisecond):
		}
	}
	t.Fatalf("no %q within %s:\n%s", re, within, p.output())
	return nil
}

func freeAddr(t *testing.T) string {
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer ln.Close()
	return ln.Addr().String()
}

func scrapeSamples(t *testing.T, addr string) float64 {
	t.Helper()
	resp, err := http.Get("http://" + addr + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	total := 0.0
	sc := bufio.NewScanner(resp.Body)
	for sc.Scan() {
		line := sc.Text()
		if strings.HasPrefix(line, "beliefd_samples_drawn_total{") {
			f := strings.Fields(line)
			v, _ := strconv.ParseFloat(f[len(f)-1], 64)
			total += v
		}
	}
	return total
}

// One API process and two worker processes sharing one Redis finish a job
// with exact sample accounting, and the answer equals a single-process run
// with the same seed, bit for bit.
func TestProcessesShareRedis(t *testing.T) {
	if testing.Short() {
		t.Skip("starts processes")
	}
	rs := redistest.StartServer(t, redistest.Options{})
	processesShareRedis(t, "--redis", rs.URL())
}

// TestProcessesShareRedisCluster is TestProcessesShareRedis on a Redis
// Cluster of three primaries (--redis-cluster).
func TestProcessesShareRedisCluster(t *testing.T) {
	if testing.Short() {
		t.Skip("starts processes")
	}
	processesShareRedis(t, "--redis", redistest.ClusterURL(t), "--redis-cluster")
}

// processesShareRedis runs an API process and two worker processes on the
// Redis that redisArgs name, and checks that a job is shared by both
// workers, draws exactly its samples and equals a single-process run.
func processesShareRedis(t *testing.T, redisArgs ...string) {
	args := func(a ...string) []string {
		return append(append([]string{}, a[:1]...), append(append([]string{}, redisArgs...), a[1:]...)...)
	}
	api := startProc(t, args("serve", "--workers", "0", "--http-addr", "127.0.0.1:0", "--grpc-addr", "127.0.0.1:0")...)
	m := api.waitFor(t, regexp.MustCompile(`serving on (http://[0-9.:]+) `), 30*time.Second)
	base := m[1]
	metricsA, metricsB := freeAddr(t), freeAddr(t)
	startProc(t, args("worker", "--workers", "1", "--metrics-addr", metricsA)...)
	startProc(t, args("worker", "--workers", "1", "--metrics-addr", metricsB)...)

	seed := uint64(20261202)
	q := &infer.Query{
		Model:    "tarnwick-platform",
		Evidence: map[string]string{"alarm_checkout_5xx": "firing"},
		Targets:  []string{"bad_deploy", "orders_db", "core_network"},
		Method:   infer.MethodLikelihoodWeighting,
		Stop:     infer.StopRule{MaxSamples: 24*8192 + 100},
		Seed:     &seed,
	}
	body, _ := json.Marshal(q)
	resp, err := http.Post(base+"/v1/jobs", "application/json", bytes.NewReader(body))
	if err != nil {
		t.Fatal(err)
	}
	var view map[string]any
	json.NewDecoder(resp.Body).Decode(&view)
	resp.Body.Close()
	if resp.StatusCode != http.StatusAccepted {
		t.Fatalf("submit: %d %v", resp.StatusCode, view)
	}
	id := view["id"].(string)
	deadline := time.Now().Add(60 * time.Second)
	for view["state"] != "succeeded" {
		if time.Now().After(deadline) || view["state"] == "failed" || view["state"] == "cancelled" {
			t.Fatalf("job did not succeed in time: %v", view["state"])
		}
		time.Sleep(100 * time.Millisecond)
		r, err := http.Get(base + "/v1/jobs/" + id)
		if err != nil {
			t.Fatal(err)
		}
		view = map[string]any{}
		json.NewDecoder(r.Body).Decode(&view)
		r.Body.Close()
	}
	if got := int64(view["samples"].(float64)); got != q.Stop.MaxSamples {
		t.Errorf("job drew %d samples, want exactly %d", got, q.Stop.MaxSamples)
	}
	a, b := scrapeSamples(t, metricsA), scrapeSamples(t, metricsB)
	if a+b != float64(q.Stop.MaxSamples) || a == 0 || b == 0 {
		t.Errorf("workers drew %v + %v samples; want both working and %d in all", a, b, q.Stop.MaxSamples)
	}

	// The same query in this process.
	_, net, err := examples.Load("tarnwick-platform")
	if err != nil {
		t.Fatal(err)
	}
	want, err := infer.NewRunner(infer.Options{}).Run(context.Background(), net, q, nil)
	if err != nil {
		t.Fatal(err)
	}
	strip := func(v any) string {
		var m map[string]any
		b, _ := json.Marshal(v)
		json.Unmarshal(b, &m)
		for _, k := range []string{"elapsed_seconds", "state", "id", "job"} {
			delete(m, k)
		}
		out, _ := json.Marshal(m)
		return string(out)
	}
	if strip(view) != strip(want) {
		t.Errorf("service result differs from a single-process run:\nservice %s\nrun     %s", strip(view), strip(want))
	}
}

// SIGTERM ends serve promptly and cleanly.
func TestServeGracefulShutdown(t *testing.T) {
	if testing.Short() {
		t.Skip("starts processes")
	}
	p := startProc(t, "serve", "--http-addr", "127.0.0.1:0", "--grpc-addr", "127.0.0.1:0", "--shutdown-timeout", "5s")
	p.waitFor(t, regexp.MustCompile(`serving on`), 30*time.Second)
	start := time.Now()
	p.cmd.Process.Signal(syscall.SIGTERM)
	select {
	case err := <-p.done:
		p.done <- err // for cleanup
		if err != nil {
			t.Errorf("serve exited with %v after SIGTERM:\n%s", err, p.output())
		}
		if d := time.Since(start); d > 8*time.Second {
			t.Errorf("shutdown took %s, beyond the 5s timeout", d)
		}
	case <-time.After(15 * time.Second):
		t.Fatal("serve did not exit within 15s of SIGTERM")
	}
}

// Bad settings are named at start.
func TestServeConfigErrors(t *testing.T) {
	for _, tc := range []struct {
		args []string
		want string
	}{
		{[]string{"serve", "--http-addr", "nonsense"}, "--http-addr"},
		{[]string{"serve", "--redis", "http://x"}, "--redis"},
		{[]string{"serve", "--max-jobs", "0"}, "--max-jobs"},
		{[]string{"serve", "--log-format", "xml"}, "--log-format"},
		{[]string{"worker"}, "--redis is required"},
	} {
		code, _, errs := runCLI(t, tc.args...)
		if code != 2 || !strings.Contains(errs, tc.want) {
			t.Errorf("%v: exit %d, stderr %q; want exit 2 naming %s", tc.args, code, errs, tc.want)
		}
	}
	t.Setenv("BELIEFD_MAX_JOBS", "-3")
	code, _, errs := runCLI(t, "serve")
	if code != 2 || !strings.Contains(errs, "--max-jobs -3") {
		t.Errorf("env BELIEFD_MAX_JOBS=-3: exit %d, stderr %q", code, errs)
	}
}
