package infer_test

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"math"
	"strings"
	"testing"

	"github.com/beliefd/beliefd/service/exact"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
	"github.com/beliefd/beliefd/service/sampling/gibbs"
)

// fuzzSampleCap bounds the samples of one fuzzed sampling run, so that an
// input asking for 10^9 samples still takes milliseconds.
const fuzzSampleCap = 2048

// clientSentinels are the errors that name a problem with the query (the
// transports map each to invalid-argument). A query that fails must fail
// with one of them.
var clientSentinels = []error{
	infer.ErrBadQuery, model.ErrBadEvidence, sampling.ErrBadStop,
	exact.ErrZeroEvidence, exact.ErrTooCostly,
	gibbs.ErrImpossibleEvidence, gibbs.ErrReducible,
	sampling.ErrEvidenceNotSupported, sampling.ErrUnknownMethod,
}

func isClientError(err error) bool {
	for _, s := range clientSentinels {
		if errors.Is(err, s) {
			return true
		}
	}
	return false
}

// FuzzDecodeQuery feeds arbitrary bytes to DecodeQuery and runs what it
// accepts against the chest-clinic network twice: as written, with the
// samples capped at fuzzSampleCap, and by exact inference (with the most
// probable explanation). Each step must return a result or an error
// wrapping a known sentinel, and never panic. Exact answers are checked
// against brute-force enumeration of the network's 2^8 joint states; every
// result must be finite, well-ordered (lo <= p <= hi within [0, 1]) and
// encode as JSON.
//
//	go test -run '^$' -fuzz '^FuzzDecodeQuery$' -fuzztime 30s ./service/infer/
func FuzzDecodeQuery(f *testing.F) {
	seeds := []string{
		`{"model": "chest-clinic"}`,
		`{"model": "chest-clinic", "evidence": {"xray": "yes"}, "targets": ["tub", "lung"], "mpe": true}`,
		`{"model": "chest-clinic", "evidence": {"xray": "yes"}, "soft_evidence": {"dysp": [0.3, 0.9]}, "method": "likelihood-weighting", "seed": 7, "stop": {"max_samples": 5000}}`,
		`{"model": "chest-clinic", "evidence": {"dysp": "yes"}, "method": "rejection", "stop": {"abs_err": 0.05, "confidence": 0.9}}`,
		`{"model": "chest-clinic", "method": "forward", "stop": {"timeout": "1s", "rel_err": 0.5}}`,
		`{"model": "chest-clinic", "evidence": {"smoke": "no"}, "method": "gibbs"}`,
		`{"model": "chest-clinic", "evidence": {"tub": "yes", "either": "no"}, "method": "likelihood-weighting"}`,
		`{"model": "chest-clinic", "soft_evidence": {"asia": [0, 0]}}`,
		`{"model": "chest-clinic", "soft_evidence": {"asia": [1e-300, 1]}, "evidence": {"xray": "no"}, "mpe": true}`,
		`{"model": "chest-clinic", "evidence": {"xray": "yes"}, "soft_evidence": {"xray": [1, 1]}}`,
		`{"model": "chest-clinic", "soft_evidence": {"dysp": [1e-200, 1e-200]}, "method": "likelihood-weighting"}`,
		`{"model": "chest-clinic", "soft_evidence": {"dysp": [1e-200, 1e-190], "asia": [5e-324, 1]}, "method": "rejection"}`,
		`{"model": "chest-clinic", "soft_evidence": {"dysp": [1e308, 1e308], "xray": [2, 1]}, "method": "likelihood-weighting"}`,
		`{"model": "chest-clinic", "evidence": {"xray": "yes"}, "method": "adaptive-importance", "stop": {"rel_err": 0.1}}`,
		`{"model": "chest-clinic", "evidence": {"dysp": "yes"}, "method": "adaptive-importance", "adaptive": {"rare_targets": ["tub"], "rare_threshold": 0.01, "eps_delta": {"epsilon": 0.1, "delta": 0.05}}}`,
		`{"model": "chest-clinic", "method": "auto", "adaptive": {"rare_threshold": 2, "eps_delta": {"epsilon": 0, "delta": 1}}}`,
		`{"model": "chest-clinic", "evidence": {"xrya": "yes"}}`,
		`{"model": "chest-clinic", "stop": {"max_samples": -1}}`,
		`{"model": "chest-clinic", "stop": {"confidence": 1.5, "abs_err": 2, "timeout": "-1s"}}`,
		`{"model": "chest-clinic", "method": "magic", "priority": "urgent"}`,
		`{"model": "chest-clinic", "stop": {"max_samples": 1e30}}`,
		`{"model": "chest-clinic", "soft_evidence": {"dysp": ["NaN", 1]}}`,
		`{"model": "chest-clinic", "unknown": 1}`,
		`{"model": "chest-clinic"} {}`,
		`{"model": "chest-clinic", "targets": ["tub", "tub", "dysp"], "seed": 18446744073709551615}`,
		`{"model": "chest-clinic", "evidence": {"tub":`,
		strings.Repeat("[", 1000),
		``,
	}
	for _, s := range seeds {
		f.Add([]byte(s))
	}
	net := testnets.MustCompile(testnets.ChestClinic())
	runner := infer.NewRunner(infer.Options{Workers: 1})
	f.Fuzz(func(t *testing.T, data []byte) {
		q, err := infer.DecodeQuery(bytes.NewReader(data), 1<<16)
		if err != nil {
			if !errors.Is(err, infer.ErrBadQuery) {
				t.Fatalf("decode error without ErrBadQuery: %v", err)
			}
			if err.Error() == infer.ErrBadQuery.Error() {
				t.Fatalf("decode error %q does not say what is wrong", err)
			}
			return
		}
		// DecodeQuery validated q: validating again must agree.
		if err := q.Validate(); err != nil {
			t.Fatalf("a decoded query fails Validate: %v", err)
		}
		if q.Seed == nil {
			seed := uint64(1) // reproducible failures
			q.Seed = &seed
		}
		ctx := context.Background()

		// As written, with few samples.
		capped := *q
		if capped.Stop.MaxSamples == 0 || capped.Stop.MaxSamples > fuzzSampleCap {
			capped.Stop.MaxSamples = fuzzSampleCap
		}
		res, err := runner.Run(ctx, net, &capped, nil)
		checkOutcome(t, "as written", res, err)
		if err == nil && res.Method != infer.MethodExact && res.Samples > capped.Stop.MaxSamples {
			t.Errorf("%d samples drawn, cap %d", res.Samples, capped.Stop.MaxSamples)
		}

		// Exact, with the most probable explanation, against brute force.
		ex := *q
		ex.Method, ex.MPE = infer.MethodExact, true
		res, err = runner.Run(ctx, net, &ex, nil)
		checkOutcome(t, "exact", res, err)
		if errors.Is(err, infer.ErrBadQuery) {
			return // the query has options of another method
		}
		ev, everr := net.ResolveEvidence(q.Evidence, q.SoftEvidence)
		targets, terr := net.ResolveTargets(q.Targets, ev)
		if everr != nil || terr != nil {
			if err == nil {
				t.Fatalf("exact run accepted evidence or targets that do not resolve: %v %v", everr, terr)
			}
			return
		}
		checkExact(t, net, ev, targets, res, err)
	})
}

// checkOutcome: an error names a known sentinel; a result is finite,
// well-ordered and encodes as JSON.
func checkOutcome(t *testing.T, what string, res *infer.Result, err error) {
	t.Helper()
	if err != nil {
		if !isClientError(err) {
			t.Fatalf("%s: error wraps no known sentinel: %v", what, err)
		}
		return
	}
	if _, err := json.Marshal(res); err != nil {
		t.Fatalf("%s: the result does not encode as JSON: %v", what, err)
	}
	ordered := func(name string, iv sampling.Interval) {
		ok := !math.IsNaN(iv.P) && !math.IsNaN(iv.Lo) && !math.IsNaN(iv.Hi) &&
			0 <= iv.Lo && iv.Lo <= iv.P && iv.P <= iv.Hi && iv.Hi <= 1
		if !ok {
			t.Errorf("%s: %s = %+v is not 0 <= lo <= p <= hi <= 1", what, name, iv)
		}
	}
	for v, states := range res.Marginals {
		for s, iv := range states {
			ordered(v+"="+s, iv)
		}
	}
	if e := res.EvidenceProbability; e != nil {
		if !(e.P >= 0 && e.Lo >= 0 && e.Lo <= e.P && e.P <= e.Hi) || math.IsInf(e.Hi, 0) {
			t.Errorf("%s: P(evidence) = %+v is not 0 <= lo <= p <= hi < inf", what, *e)
		}
	}
	if !(res.Confidence > 0 && res.Confidence < 1) {
		t.Errorf("%s: confidence %v", what, res.Confidence)
	}
}

// checkExact compares an exact answer with brute-force enumeration of the
// joint distribution: P(x, e) = prod_v P(x_v | parents) * lik_v(x_v) over
// the assignments x that agree with the hard evidence (the chain rule of
// a Bayesian network; common practice).
func checkExact(t *testing.T, net *model.Network, ev *model.Evidence, targets []int, res *infer.Result, err error) {
	t.Helper()
	// Posteriors do not change when a likelihood vector is scaled, so each is
	// scaled to a maximum of 1 (keeping the sums away from underflow);
	// logScale remembers what P(evidence) lost.
	soft := make([][]float64, len(net.Vars))
	logScale := 0.0
	for v, l := range ev.Soft {
		if l == nil {
			continue
		}
		m := 0.0
		for _, x := range l {
			m = math.Max(m, x)
		}
		soft[v] = make([]float64, len(l))
		for k, x := range l {
			soft[v][k] = x / m
		}
		logScale += math.Log(m)
	}
	n := len(net.Vars)
	x := make([]int, n)
	marg := make([][]float64, n)
	for v := range marg {
		marg[v] = make([]float64, net.Vars[v].Card())
	}
	total, best := 0.0, -1.0
	var bestX []int
	for {
		p := 1.0
		for v := 0; v < n && p > 0; v++ {
			nd := &net.Vars[v]
			if h := ev.Hard[v]; h >= 0 && x[v] != h {
				p = 0
				break
			}
			row := 0
			for j, par := range nd.Parents {
				row += x[par] * nd.Strides[j]
			}
			p *= nd.CPT[row*nd.Card()+x[v]]
			if soft[v] != nil {
				p *= soft[v][x[v]]
			}
		}
		total += p
		for v := range x {
			marg[v][x[v]] += p
		}
		if p > best {
			best, bestX = p, append(bestX[:0], x...)
		}
		// Next assignment (odometer).
		v := n - 1
		for ; v >= 0; v-- {
			x[v]++
			if x[v] < net.Vars[v].Card() {
				break
			}
			x[v] = 0
		}
		if v < 0 {
			break
		}
	}
	if total == 0 {
		if !errors.Is(err, exact.ErrZeroEvidence) {
			t.Fatalf("exact: evidence of probability 0 (brute force) gave %v, want ErrZeroEvidence", err)
		}
		return
	}
	if err != nil {
		t.Fatalf("exact: brute force gives P(evidence) > 0 (scaled %g), but: %v", total, err)
	}
	for _, v := range targets {
		nd := &net.Vars[v]
		for s, name := range nd.States {
			want := marg[v][s] / total
			got := res.Marginals[nd.Name][name]
			if math.Abs(got.P-want) > 1e-9 || got.Lo != got.P || got.Hi != got.P {
				t.Errorf("exact: P(%s=%s | e) = %+v, brute force %.12g", nd.Name, name, got, want)
			}
		}
	}
	if len(res.Marginals) != len(targets) {
		t.Errorf("exact: %d marginals for %d targets", len(res.Marginals), len(targets))
	}
	wantLog10 := (math.Log(total) + logScale) / math.Ln10
	if e := res.EvidenceProbability; ev.Empty() != (e == nil) {
		t.Errorf("exact: evidence_probability %v with evidence empty = %v", e, ev.Empty())
	} else if e != nil && (e.Log10 == nil || math.Abs(*e.Log10-wantLog10) > 1e-9) {
		t.Errorf("exact: log10 P(evidence) = %v, brute force %.12g", e.Log10, wantLog10)
	}
	if res.MPE == nil {
		t.Fatal("exact: no most probable explanation")
	}
	// The assignment may differ from bestX when several tie; its joint
	// probability may not.
	got := make([]int, n)
	for v := range net.Vars {
		nd := &net.Vars[v]
		s, ok := nd.StateIndex(res.MPE.Assignment[nd.Name])
		if !ok {
			t.Fatalf("exact: MPE gives %s the state %q", nd.Name, res.MPE.Assignment[nd.Name])
		}
		got[v] = s
	}
	pGot := 1.0
	for v := range net.Vars {
		nd := &net.Vars[v]
		if h := ev.Hard[v]; h >= 0 && got[v] != h {
			t.Fatalf("exact: MPE %v contradicts the hard evidence", res.MPE.Assignment)
		}
		row := 0
		for j, par := range nd.Parents {
			row += got[par] * nd.Strides[j]
		}
		pGot *= nd.CPT[row*nd.Card()+got[v]]
		if soft[v] != nil {
			pGot *= soft[v][got[v]]
		}
	}
	if math.Abs(pGot-best) > 1e-12*best {
		t.Errorf("exact: MPE %v has scaled joint %.15g, brute-force maximum %.15g at %v", res.MPE.Assignment, pGot, best, bestX)
	}
	if wantMPE := (math.Log(best) + logScale) / math.Ln10; res.MPE.Log10Joint == nil || math.Abs(*res.MPE.Log10Joint-wantMPE) > 1e-9 {
		t.Errorf("exact: MPE log10 joint %v, brute force %.12g", res.MPE.Log10Joint, wantMPE)
	}
	if math.Abs(res.MPE.P-best/total) > 1e-9 {
		t.Errorf("exact: MPE P(assignment | e) = %.12g, brute force %.12g", res.MPE.P, best/total)
	}
}
