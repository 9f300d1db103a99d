package main

import (
	"bufio"
	"encoding/json"
	"math"
	"net/http"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/examples"
	"github.com/beliefd/beliefd/service/standing/standingtest"
	"github.com/beliefd/beliefd/worker/redisstore/redistest"
)

// standingGauge reads one beliefd_standing_posterior sample from /metrics
// of an API process; ok is false when it is not exported.
func standingGauge(t *testing.T, base, id, variable, state string) (float64, bool) {
	t.Helper()
	resp, err := http.Get(base + "/metrics")
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	prefix := `beliefd_standing_posterior{standing_query="` + id + `",state="` + state + `",tenant="",variable="` + variable + `"} `
	sc := bufio.NewScanner(resp.Body)
	for sc.Scan() {
		if v, ok := strings.CutPrefix(sc.Text(), prefix); ok {
			x, err := strconv.ParseFloat(v, 64)
			if err != nil {
				t.Fatal(err)
			}
			return x, true
		}
	}
	return 0, false
}

// Two API processes on one Redis: a standing query registered over HTTP
// through one is updated with the command-line client through the other,
// and both export the same gauge, equal to brute-force enumeration of the
// example model on the evidence; a delete through one removes it from both.
func TestStandingAcrossProcesses(t *testing.T) {
	if testing.Short() {
		t.Skip("starts processes")
	}
	rs := redistest.StartServer(t, redistest.Options{})
	re := regexp.MustCompile(`serving on (http://[0-9.:]+) \(HTTP\) and ([0-9.:]+) \(gRPC\)`)
	var https, grpcs []string
	for range 2 {
		p := startProc(t, "serve", "--redis", rs.URL(), "--workers", "0", "--http-addr", "127.0.0.1:0", "--grpc-addr", "127.0.0.1:0")
		m := p.waitFor(t, re, 30*time.Second)
		https, grpcs = append(https, m[1]), append(grpcs, m[2])
	}
	resp, err := http.Post(https[0]+"/v1/standing-queries?wait=10s", "application/json", strings.NewReader(
		`{"id": "power-root-cause", "model": "tarnwick-platform", "targets": ["site_power", "utility_feed"], "evidence": {"alarm_power_bus": "firing"}}`))
	if err != nil {
		t.Fatal(err)
	}
	var v map[string]any
	json.NewDecoder(resp.Body).Decode(&v)
	resp.Body.Close()
	if resp.StatusCode != http.StatusCreated || v["status"] != "current" {
		t.Fatalf("create: %d %v", resp.StatusCode, v)
	}
	code, out, errs := runCLI(t, "standing", "evidence", "power-root-cause", "--server", grpcs[1], "--set", "alarm_ups_on_battery=firing", "--wait", "10s")
	if code != 0 || !strings.Contains(out, "revision 2") || !strings.Contains(out, "status         current") {
		t.Fatalf("standing evidence: exit %d\n%s%s", code, out, errs)
	}
	_, net, err := examples.Load("tarnwick-platform")
	if err != nil {
		t.Fatal(err)
	}
	want, err := standingtest.Enumerate(net, map[string]string{"alarm_power_bus": "firing", "alarm_ups_on_battery": "firing"}, "site_power")
	if err != nil {
		t.Fatal(err)
	}
	for i, base := range https {
		// A process that did not compute reads the result at its next tick (1s).
		deadline := time.Now().Add(10 * time.Second)
		for {
			got, ok := standingGauge(t, base, "power-root-cause", "site_power", "lost")
			// Junction tree and enumeration add the same products in another order.
			if ok && math.Abs(got-want["lost"]) <= 1e-12 {
				break
			}
			if time.Now().After(deadline) {
				t.Fatalf("process %d exports P(site_power=lost) = %v (present %v), brute force %v", i, got, ok, want["lost"])
			}
			time.Sleep(100 * time.Millisecond)
		}
	}
	code, out, errs = runCLI(t, "standing", "list", "--server", grpcs[0])
	if code != 0 || !strings.Contains(out, "power-root-cause") {
		t.Fatalf("standing list: exit %d\n%s%s", code, out, errs)
	}
	code, _, errs = runCLI(t, "standing", "--server", grpcs[0], "evidence", "power-root-cause", "--set", "alarm_nope=firing")
	if code != 1 || !strings.Contains(errs, `unknown variable "alarm_nope"`) {
		t.Fatalf("bad evidence: exit %d: %s", code, errs)
	}
	req, _ := http.NewRequest("DELETE", https[1]+"/v1/standing-queries/power-root-cause", nil)
	dresp, err := http.DefaultClient.Do(req)
	if err != nil {
		t.Fatal(err)
	}
	dresp.Body.Close()
	if dresp.StatusCode != http.StatusNoContent {
		t.Fatalf("delete: %d", dresp.StatusCode)
	}
	for i, base := range https {
		deadline := time.Now().Add(10 * time.Second)
		for {
			if _, ok := standingGauge(t, base, "power-root-cause", "site_power", "lost"); !ok {
				break
			}
			if time.Now().After(deadline) {
				t.Fatalf("process %d still exports the deleted standing query", i)
			}
			time.Sleep(100 * time.Millisecond)
		}
	}
}
