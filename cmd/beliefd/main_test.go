package main

import (
	"bytes"
	"context"
	"encoding/json"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

func runCLI(t *testing.T, args ...string) (code int, stdout, stderr string) {
	t.Helper()
	var out, errb bytes.Buffer
	code = run(context.Background(), args, nil, &out, &errb)
	return code, out.String(), errb.String()
}

// chestClinic is the chest-clinic network of Lauritzen & Spiegelhalter
// (1988), JRSS-B 50(2):157-224, as a model document.
const chestClinic = `{"name": "chest-clinic", "variables": [
 {"name": "asia", "states": ["no", "yes"], "table": [[0.99, 0.01]]},
 {"name": "smoke", "states": ["no", "yes"], "table": [[0.5, 0.5]]},
 {"name": "tub", "states": ["no", "yes"], "parents": ["asia"], "table": [[0.99, 0.01], [0.95, 0.05]]},
 {"name": "lung", "states": ["no", "yes"], "parents": ["smoke"], "table": [[0.99, 0.01], [0.9, 0.1]]},
 {"name": "bronc", "states": ["no", "yes"], "parents": ["smoke"], "table": [[0.7, 0.3], [0.4, 0.6]]},
 {"name": "either", "states": ["no", "yes"], "parents": ["tub", "lung"], "gate": {"type": "any_of"}},
 {"name": "xray", "states": ["no", "yes"], "parents": ["either"], "table": [[0.95, 0.05], [0.02, 0.98]]},
 {"name": "dysp", "states": ["no", "yes"], "parents": ["either", "bronc"], "table": [[0.9, 0.1], [0.2, 0.8], [0.3, 0.7], [0.1, 0.9]]}
]}`

func writeChestClinic(t *testing.T) string {
	t.Helper()
	data := []byte(chestClinic)
	path := filepath.Join(t.TempDir(), "chest.json")
	if err := os.WriteFile(path, data, 0o644); err != nil {
		t.Fatal(err)
	}
	return path
}

// Exact answers through the command line, against the published values of
// the chest-clinic network (Lauritzen & Spiegelhalter 1988, JRSS-B 50(2)):
// with asia=yes and dysp=yes, P(e) = 0.00450138 and P(bronc=yes) = 0.811402.
func TestRunExactJSON(t *testing.T) {
	path := writeChestClinic(t)
	code, out, errs := runCLI(t, "run", "--model", path, "--evidence", "asia=yes", "--evidence", "dysp=yes", "--json")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errs)
	}
	var doc struct {
		Method   string `json:"method"`
		Stop     string `json:"stop_reason"`
		Evidence struct {
			P, Lo, Hi float64
			Log10     *float64
		} `json:"evidence_probability"`
		Marginals map[string]map[string]struct{ P, Lo, Hi float64 } `json:"marginals"`
		Caution   string                                            `json:"caution"`
	}
	if err := json.Unmarshal([]byte(out), &doc); err != nil {
		t.Fatalf("result is not JSON: %v\n%s", err, out)
	}
	if doc.Method != "exact" || doc.Stop != "exact" {
		t.Errorf("method %q stop %q, want exact", doc.Method, doc.Stop)
	}
	if d := doc.Evidence.P - 0.00450138; d > 5e-9 || d < -5e-9 {
		t.Errorf("P(e) = %.9f, want 0.00450138", doc.Evidence.P)
	}
	b := doc.Marginals["bronc"]["yes"]
	if d := b.P - 0.811402; d > 5e-6 || d < -5e-6 || b.Lo != b.P || b.Hi != b.P {
		t.Errorf("bronc=yes %+v, want 0.811402 with lo = hi = p", b)
	}
	if _, ok := doc.Marginals["asia"]; ok {
		t.Error("observed variable reported as a target by default")
	}
	if doc.Caution == "" {
		t.Error("result carries no caution")
	}
}

// The same seed gives the same numbers with one or two sampling goroutines.
func TestRunSeedDeterminism(t *testing.T) {
	path := writeChestClinic(t)
	strip := func(s string) string {
		var m map[string]any
		if err := json.Unmarshal([]byte(s), &m); err != nil {
			t.Fatal(err)
		}
		delete(m, "elapsed_seconds")
		b, _ := json.Marshal(m)
		return string(b)
	}
	var outs []string
	for _, w := range []string{"1", "2"} {
		code, out, errs := runCLI(t, "run", "--model", path, "--evidence", "xray=yes", "--method", "likelihood-weighting",
			"--samples", "50000", "--seed", "11", "--workers", w, "--json")
		if code != 0 {
			t.Fatalf("exit %d: %s", code, errs)
		}
		outs = append(outs, strip(out))
	}
	if outs[0] != outs[1] {
		t.Errorf("results differ between 1 and 2 workers:\n%s\n%s", outs[0], outs[1])
	}
}

func TestRunHumanOutput(t *testing.T) {
	code, out, errs := runCLI(t, "run", "--example", "tarnwick-platform", "--evidence", "alarm_checkout_5xx=firing",
		"--target", "bad_deploy", "--method", "rejection", "--samples", "20000", "--seed", "3")
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errs)
	}
	for _, want := range []string{"method   rejection", "95% interval", "bad_deploy", "samples 20,000", "stopped by max_samples", "seed 3", "acceptance rate", "caution:"} {
		if !strings.Contains(out, want) {
			t.Errorf("output lacks %q:\n%s", want, out)
		}
	}
}

func TestErrors(t *testing.T) {
	path := writeChestClinic(t)
	bad := filepath.Join(t.TempDir(), "bad.json")
	os.WriteFile(bad, []byte(`{"variables":[{"name":"x","states":["ok","failed"],"table":[[0.9,0.2]]}]}`), 0o644)
	for _, tc := range []struct {
		args []string
		code int
		want string
	}{
		{[]string{"run"}, 2, "no model"},
		{[]string{"run", "--model", path, "--evidence", "asia"}, 2, "want var=state"},
		{[]string{"run", "--model", path, "--evidence", "asia=maybe"}, 1, `no state "maybe"`},
		{[]string{"run", "--model", path, "--evidence", "Asia=yes"}, 1, `did you mean "asia"`},
		{[]string{"run", "--model", path, "--method", "magic"}, 2, `unknown method "magic"`},
		{[]string{"run", "--model", path, "--confidence", "1.5"}, 2, "confidence"},
		{[]string{"run", "--model", path, "--soft", "xray=a,b"}, 2, "is not a number"},
		{[]string{"run", "--model", bad}, 1, "sums to 1.1"},
		{[]string{"run", "--model", "/nonexistent.json"}, 1, "open model"},
		{[]string{"run", "--model", path, "--method", "forward", "--evidence", "asia=yes"}, 1, "rejection"},
		{[]string{"check", bad}, 1, `variable "x"`},
		{[]string{"frobnicate"}, 2, "unknown command"},
		{[]string{"example", "nope"}, 2, "no such example"},
	} {
		code, _, errs := runCLI(t, tc.args...)
		if code != tc.code || !strings.Contains(errs, tc.want) {
			t.Errorf("%v: exit %d, stderr %q; want exit %d containing %q", tc.args, code, errs, tc.code, tc.want)
		}
	}
}

func TestCheck(t *testing.T) {
	path := writeChestClinic(t)
	code, out, errs := runCLI(t, "check", path)
	if code != 0 {
		t.Fatalf("exit %d: %s", code, errs)
	}
	// Chest clinic: 8 variables, 8 arcs, 18 free parameters (counted from
	// the network's tables, Lauritzen & Spiegelhalter 1988).
	for _, want := range []string{"valid", "variables        8", "arcs             8", "free parameters  18", "method auto uses exact inference"} {
		if !strings.Contains(out, want) {
			t.Errorf("check output lacks %q:\n%s", want, out)
		}
	}
	code, out, _ = runCLI(t, "example")
	if code != 0 || !strings.Contains(out, "tarnwick-platform") {
		t.Errorf("example list: exit %d\n%s", code, out)
	}
}
