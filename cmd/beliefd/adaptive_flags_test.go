package main

import (
	"encoding/json"
	"math"
	"strings"
	"testing"

	"github.com/beliefd/beliefd/service/infer"
)

// The adaptive flags reach the query document: a rare target on the
// chest-clinic network (Lauritzen & Spiegelhalter 1988, JRSS-B
// 50(2):157-224) with unlikely evidence. The 95% intervals of the run
// must hold the exact values, which the junction tree computes from the
// same file (a single fixed-seed check: it fails by chance with
// probability about 0.05 per marginal for a new seed, and repeatably
// never for this one).
func TestRunAdaptiveFlags(t *testing.T) {
	path := writeChestClinic(t)
	args := []string{"run", "--model", path, "--json", "--evidence", "asia=yes,xray=yes", "--target", "tub,lung", "--seed", "5"}
	code, out, errOut := runCLI(t, append(args, "--method", "exact")...)
	if code != 0 {
		t.Fatalf("exact run: exit %d: %s", code, errOut)
	}
	var ex infer.Result
	if err := json.Unmarshal([]byte(out), &ex); err != nil {
		t.Fatal(err)
	}
	code, out, errOut = runCLI(t, append(args, "--method", "adaptive-importance", "--rare", "tub", "--rare-threshold", "-1",
		"--rel-err", "0.05", "--eps-delta", "0.2,0.05")...)
	if code != 0 {
		t.Fatalf("adaptive run: exit %d: %s", code, errOut)
	}
	var ad infer.Result
	if err := json.Unmarshal([]byte(out), &ad); err != nil {
		t.Fatal(err)
	}
	if ad.Method != infer.MethodAdaptive {
		t.Fatalf("method %q", ad.Method)
	}
	for _, v := range []string{"tub", "lung"} {
		want := ex.Marginals[v]["yes"].P
		iv := ad.Marginals[v]["yes"]
		if !(iv.Lo <= want && want <= iv.Hi) || math.IsNaN(iv.P) {
			t.Errorf("P(%s=yes) = %v [%v, %v]; exact %v outside the interval", v, iv.P, iv.Lo, iv.Hi, want)
		}
	}
	if ad.StopReason != "rel_err" && ad.StopReason != "eps_delta" {
		t.Errorf("stop reason %q, want rel_err or eps_delta", ad.StopReason)
	}
}

// Bad adaptive flags are usage errors that name the flag.
func TestRunAdaptiveFlagErrors(t *testing.T) {
	path := writeChestClinic(t)
	for _, tc := range []struct {
		args []string
		want string
	}{
		{[]string{"--eps-delta", "0.1"}, "--eps-delta"},
		{[]string{"--eps-delta", "0.1,x"}, "--eps-delta"},
		{[]string{"--eps-delta", "2,0.05"}, "eps_delta.epsilon"},
		{[]string{"--rare-threshold", "1.5"}, "rare_threshold"},
		{[]string{"--method", "gibbs", "--rare", "tub"}, "adaptive options"},
		{[]string{"--method", "adaptive-importance", "--rare", "nosuch"}, "nosuch"},
	} {
		code, _, errOut := runCLI(t, append([]string{"run", "--model", path}, tc.args...)...)
		if code == 0 || !strings.Contains(errOut, tc.want) {
			t.Errorf("%v: exit %d, stderr %q; want an error naming %q", tc.args, code, errOut, tc.want)
		}
	}
}
