package convert

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"reflect"
	"strings"
	"testing"
	"time"

	beliefv1 "github.com/beliefd/beliefd/proto/belief/v1"
	"github.com/beliefd/beliefd/service/examples"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
	"google.golang.org/protobuf/proto"
)

// wire sends a message through the protobuf wire format and back, so the
// round trips below also cover what crosses a network.
func wire[M proto.Message](t *testing.T, m M) M {
	t.Helper()
	data, err := proto.Marshal(m)
	if err != nil {
		t.Fatalf("marshal: %v", err)
	}
	out := m.ProtoReflect().New().Interface().(M)
	if err := proto.Unmarshal(data, out); err != nil {
		t.Fatalf("unmarshal: %v", err)
	}
	return out
}

func jsonOf(t *testing.T, v any) string {
	t.Helper()
	b, err := json.Marshal(v)
	if err != nil {
		t.Fatal(err)
	}
	return string(b)
}

func f(x float64) *float64 { return &x }

// everyKind has one variable per distribution kind, with the optional
// fields set.
func everyKind() *model.Document {
	return &model.Document{
		Name:        "every-kind",
		Description: "one variable per distribution kind",
		Variables: []model.Variable{
			{Name: "feed", Description: "utility feed", States: []string{"ok", "lost"},
				FailureRate: &model.FailureRate{Lambda: 2e-5, MissionTime: 720}},
			{Name: "ups", States: []string{"ok", "failed"}, Table: [][]float64{{0.999, 0.001}}},
			{Name: "power", States: []string{"ok", "lost"}, Parents: []string{"feed", "ups"},
				Gate: &model.Gate{Type: model.GateAllOf}},
			{Name: "fans", States: []string{"ok", "degraded", "down"}, FaultStates: []string{"down"},
				Rows: []model.KeyedRow{
					{Given: map[string]string{"power": "ok"}, P: []float64{0.9, 0.08, 0.02}},
					{Given: map[string]string{"power": "lost"}, P: []float64{0, 0, 1}},
				}},
			{Name: "heat", States: []string{"normal", "warm", "hot"}, Parents: []string{"fans"},
				NoisyMAX: &model.NoisyMAX{Leak: []float64{0.95, 0.04, 0.01},
					Links: map[string]map[string][]float64{"fans": {
						"degraded": {0.5, 0.4, 0.1},
						"down":     {0.1, 0.3, 0.6},
					}}}},
			{Name: "alarm", States: []string{"quiet", "firing"}, Parents: []string{"heat", "power"},
				NoisyOR: &model.NoisyOR{Leak: 0.001, Links: map[string]float64{"heat": 0.9, "power": 0.99}}},
			{Name: "two_of_three", States: []string{"ok", "failed"}, Parents: []string{"feed", "ups", "power"},
				Gate: &model.Gate{Type: model.GateKOfN, K: 2}},
			// Present but empty distributions stay present.
			{Name: "empty_table", States: []string{"a"}, Table: [][]float64{}},
			{Name: "empty_rows", States: []string{"a"}, Rows: []model.KeyedRow{}},
			// No distribution at all stays without one.
			{Name: "none", States: []string{"a", "b"}},
		},
	}
}

func TestModelRoundTrip(t *testing.T) {
	doc := everyKind()
	m, err := ModelToProto(doc)
	if err != nil {
		t.Fatal(err)
	}
	back := ModelFromProto(wire(t, m))
	if !reflect.DeepEqual(doc, back) {
		t.Errorf("round trip changed the document:\n got %s\nwant %s", jsonOf(t, back), jsonOf(t, doc))
	}
	// The typed message really is typed: each kind lands in its oneof case.
	wantCase := []any{
		&beliefv1.Variable_FailureRate{}, &beliefv1.Variable_Table{}, &beliefv1.Variable_Gate{},
		&beliefv1.Variable_Rows{}, &beliefv1.Variable_NoisyMax{}, &beliefv1.Variable_NoisyOr{},
		&beliefv1.Variable_Gate{}, &beliefv1.Variable_Table{}, &beliefv1.Variable_Rows{}, nil,
	}
	for i, v := range m.GetVariables() {
		if reflect.TypeOf(v.GetDistribution()) != reflect.TypeOf(wantCase[i]) {
			t.Errorf("variable %q: distribution %T, want %T", v.GetName(), v.GetDistribution(), wantCase[i])
		}
	}
	if k := m.GetVariables()[6].GetGate().GetK(); k != 2 {
		t.Errorf("k_of_n gate k = %d, want 2", k)
	}
}

// TestModelRoundTripExample round-trips every shipped example as read from
// its JSON, and checks that the compiled network (content hash) is unchanged.
func TestModelRoundTripExample(t *testing.T) {
	for _, name := range examples.Names() {
		raw, err := examples.Raw(name)
		if err != nil {
			t.Fatal(err)
		}
		doc, err := model.DecodeBytes(raw)
		if err != nil {
			t.Fatal(err)
		}
		m, err := ModelToProto(doc)
		if err != nil {
			t.Fatal(err)
		}
		back := ModelFromProto(wire(t, m))
		if !reflect.DeepEqual(doc, back) {
			t.Errorf("%s: round trip changed the document:\n got %s\nwant %s", name, jsonOf(t, back), jsonOf(t, doc))
		}
		n1, err := model.Compile(doc, model.Limits{})
		if err != nil {
			t.Fatal(err)
		}
		n2, err := model.Compile(back, model.Limits{})
		if err != nil {
			t.Fatal(err)
		}
		if n1.Hash != n2.Hash {
			t.Errorf("%s: content hash %s after the round trip, want %s", name, n2.Hash, n1.Hash)
		}
	}
}

func TestModelTwoDistributions(t *testing.T) {
	doc := &model.Document{Name: "x", Variables: []model.Variable{
		{Name: "both", States: []string{"ok", "failed"}, Table: [][]float64{{0.5, 0.5}}, Gate: &model.Gate{Type: model.GateAnyOf}},
	}}
	_, err := ModelToProto(doc)
	if !errors.Is(err, ErrUnrepresentable) {
		t.Fatalf("err = %v, want ErrUnrepresentable", err)
	}
	if !bytes.Contains([]byte(err.Error()), []byte(`"both"`)) {
		t.Errorf("error %q does not name the variable", err)
	}
}

func TestQueryRoundTrip(t *testing.T) {
	zero, big := uint64(0), uint64(1<<53-1)
	cases := map[string]*infer.Query{
		"empty":     {},
		"seed zero": {Model: "m", Seed: &zero},
		"everything": {
			Model:          "chest-clinic@3",
			Evidence:       map[string]string{"xray": "yes", "asia": "no"},
			SoftEvidence:   map[string][]float64{"dysp": {0.2, 0.9}, "smoke": {1, 0}},
			Targets:        []string{"lung", "tub"},
			Method:         infer.MethodLikelihoodWeighting,
			MPE:            true,
			Stop:           infer.StopRule{MaxSamples: 1_000_000, Timeout: "2m", AbsErr: 0.01, RelErr: 0.1, Confidence: 0.99},
			Seed:           &big,
			Priority:       "high",
			IdempotencyKey: "k-1",
		},
		"adaptive": {
			Model:    "m",
			Method:   infer.MethodAdaptive,
			Adaptive: &infer.AdaptiveOptions{RareTargets: []string{"top"}, RareThreshold: 1e-4, EpsDelta: &infer.EpsDeltaRule{Epsilon: 0.1, Delta: 0.05}},
		},
		"adaptive defaults": {Model: "m", Adaptive: &infer.AdaptiveOptions{}},
	}
	for name, q := range cases {
		t.Run(name, func(t *testing.T) {
			back := QueryFromProto(wire(t, QueryToProto(q)))
			if !reflect.DeepEqual(q, back) {
				t.Errorf("round trip changed the query:\n got %s\nwant %s", jsonOf(t, back), jsonOf(t, q))
			}
		})
	}
	// Seed presence survives: absent stays absent, 0 stays 0.
	if QueryFromProto(wire(t, QueryToProto(&infer.Query{}))).Seed != nil {
		t.Error("absent seed came back present")
	}
}

func fullResult() *infer.Result {
	return &infer.Result{
		Model: "chest-clinic", ModelHash: "abc123", Method: infer.MethodLikelihoodWeighting,
		MethodReason: "requested", Seed: 42, Samples: 1_000_000, EffectiveSamples: 812345.6,
		StopReason: "max_samples", ElapsedSeconds: 0.41, Confidence: 0.95,
		EvidenceProbability: &infer.EvidenceProbability{P: 0.0045, Lo: 0.0044, Hi: 0.0046, Log10: f(-2.35)},
		Marginals: map[string]map[string]sampling.Interval{
			"lung": {"no": {P: 0.9, Lo: 0.89, Hi: 0.91}, "yes": {P: 0.1, Lo: 0.09, Hi: 0.11}},
			"tub":  {"no": {P: 1, Lo: 1, Hi: 1}, "yes": {}},
		},
		MPE:         &infer.MPE{Assignment: map[string]string{"lung": "no", "tub": "no"}, P: 0.41, Joint: 0.0018, Log10Joint: f(-2.74)},
		Diagnostics: &infer.Diagnostics{AcceptanceRate: f(0.25), MaxWeightShare: f(1e-4), RHat: map[string]float64{"lung": 1.001}, ESS: map[string]float64{"lung": 900}},
		Warnings:    []string{"few effective samples"},
		Caution:     infer.Caution,
		State:       string(jobs.StateRunning),
	}
}

func TestResultRoundTrip(t *testing.T) {
	cases := map[string]*infer.Result{
		"full": fullResult(),
		"nil log10": {
			Method: infer.MethodRejection, Marginals: map[string]map[string]sampling.Interval{},
			EvidenceProbability: &infer.EvidenceProbability{P: 0, Lo: 0, Hi: 3e-6},
			MPE:                 &infer.MPE{Assignment: map[string]string{}, P: 0, Joint: 0},
			Diagnostics:         &infer.Diagnostics{},
			Caution:             infer.Caution,
		},
		"minimal": {Method: infer.MethodExact, Marginals: map[string]map[string]sampling.Interval{}},
	}
	for name, r := range cases {
		t.Run(name, func(t *testing.T) {
			m, err := ResultToProto(r)
			if err != nil {
				t.Fatal(err)
			}
			back := ResultFromProto(wire(t, m))
			if !reflect.DeepEqual(r, back) {
				t.Errorf("round trip changed the result:\n got %s\nwant %s", jsonOf(t, back), jsonOf(t, r))
			}
			if jsonOf(t, r) != jsonOf(t, back) {
				t.Errorf("JSON differs after the round trip")
			}
		})
	}
	if _, err := ResultToProto(&infer.Result{State: "paused"}); !errors.Is(err, ErrUnrepresentable) {
		t.Errorf("unknown state: err = %v, want ErrUnrepresentable", err)
	}
}

// TestResultRoundTripFromRunner round-trips results the product computes:
// exact with MPE and evidence, and a sampler with diagnostics.
func TestResultRoundTripFromRunner(t *testing.T) {
	_, net, err := examples.Load("tarnwick-platform")
	if err != nil {
		t.Fatal(err)
	}
	seed := uint64(7)
	r := infer.NewRunner(infer.Options{Workers: 1})
	for _, q := range []*infer.Query{
		{Method: infer.MethodExact, MPE: true, Evidence: map[string]string{net.Vars[len(net.Vars)-1].Name: net.Vars[len(net.Vars)-1].States[1]}},
		{Method: infer.MethodLikelihoodWeighting, Seed: &seed, Stop: infer.StopRule{MaxSamples: 20000},
			SoftEvidence: map[string][]float64{net.Vars[0].Name: {0.3, 0.9}}},
	} {
		res, err := r.Run(context.Background(), net, q, nil)
		if err != nil {
			t.Fatal(err)
		}
		m, err := ResultToProto(res)
		if err != nil {
			t.Fatal(err)
		}
		back := ResultFromProto(wire(t, m))
		if got, want := jsonOf(t, back), jsonOf(t, res); got != want {
			t.Errorf("%s: round trip changed the result:\n got %s\nwant %s", q.Method, got, want)
		}
	}
}

func TestJobRoundTrip(t *testing.T) {
	at := time.Date(2026, 3, 1, 12, 0, 0, 123456789, time.UTC)
	seed := uint64(9)
	j := &jobs.Job{
		ID: "j-1", State: jobs.StateRunning, Priority: jobs.PriorityHigh,
		Query:  infer.Query{Model: "m@2", Evidence: map[string]string{"a": "yes"}, Method: infer.MethodForward, Seed: &seed, Stop: infer.StopRule{RelErr: 0.05}},
		Model:  jobs.ModelInfo{Name: "m", Version: 2, Hash: "h", Variables: 8, Bytes: 1234, CreatedAt: at.Add(-time.Hour)},
		Method: infer.MethodForward, MethodReason: "requested", Seed: 9,
		Stop:      sampling.Stop{MaxSamples: 1e9, Timeout: 90 * time.Second, RelErr: 0.05, Confidence: 0.95},
		BlockSize: 65536, Blocks: 15259, MergedBlocks: 12,
		Result:         fullResult(),
		ResultAt:       at.Add(1500 * time.Millisecond),
		Error:          "",
		IdempotencyKey: "key",
		CreatedAt:      at, StartedAt: at.Add(time.Second), UpdatedAt: at.Add(2 * time.Second),
		Deadline:  at.Add(10 * time.Minute),
		Retention: 24 * time.Hour,
	}
	m, err := JobToProto(j)
	if err != nil {
		t.Fatal(err)
	}
	if m.GetFinishedAt() != nil {
		t.Error("zero finished_at became a timestamp")
	}
	back, err := JobFromProto(wire(t, m))
	if err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(j, back) {
		t.Errorf("round trip changed the job:\n got %s\nwant %s", jsonOf(t, back), jsonOf(t, j))
	}

	failed := &jobs.Job{ID: "j-2", State: jobs.StateFailed, Priority: jobs.PriorityLow, Error: "boom", Blocks: 1,
		Query: infer.Query{Model: "m"}, Model: jobs.ModelInfo{Name: "m", Version: 1}}
	m, err = JobToProto(failed)
	if err != nil {
		t.Fatal(err)
	}
	back, err = JobFromProto(wire(t, m))
	if err != nil {
		t.Fatal(err)
	}
	if !reflect.DeepEqual(failed, back) {
		t.Errorf("round trip changed the job:\n got %s\nwant %s", jsonOf(t, back), jsonOf(t, failed))
	}

	if _, err := JobToProto(&jobs.Job{State: "lost"}); !errors.Is(err, ErrUnrepresentable) {
		t.Errorf("unknown state: err = %v, want ErrUnrepresentable", err)
	}
	if _, err := JobToProto(&jobs.Job{State: jobs.StateQueued, Priority: 7}); !errors.Is(err, ErrUnrepresentable) {
		t.Errorf("unknown priority: err = %v, want ErrUnrepresentable", err)
	}
}

// TestEveryFieldHandled fails when a document type gains a field that the
// conversion does not know about yet, so the messages cannot fall behind
// the documents unnoticed.
func TestEveryFieldHandled(t *testing.T) {
	for _, c := range []struct {
		typ     reflect.Type
		handled string
	}{
		{reflect.TypeOf(model.Document{}), "Name Description Variables"},
		{reflect.TypeOf(model.Variable{}), "Name Description States Parents FaultStates Table Rows NoisyOR NoisyMAX Gate FailureRate"},
		{reflect.TypeOf(model.KeyedRow{}), "Given P"},
		{reflect.TypeOf(model.NoisyOR{}), "Leak Links"},
		{reflect.TypeOf(model.NoisyMAX{}), "Leak Links"},
		{reflect.TypeOf(model.Gate{}), "Type K"},
		{reflect.TypeOf(model.FailureRate{}), "Lambda MissionTime"},
		{reflect.TypeOf(infer.Query{}), "Model Evidence SoftEvidence Targets Method MPE Stop Seed Adaptive Priority IdempotencyKey"},
		{reflect.TypeOf(infer.AdaptiveOptions{}), "RareTargets RareThreshold EpsDelta"},
		{reflect.TypeOf(infer.EpsDeltaRule{}), "Epsilon Delta"},
		{reflect.TypeOf(infer.StopRule{}), "MaxSamples Timeout AbsErr RelErr Confidence"},
		{reflect.TypeOf(infer.Result{}), "Model ModelHash Method MethodReason Seed Samples EffectiveSamples StopReason ElapsedSeconds " +
			"Confidence EvidenceProbability Marginals MPE Diagnostics Warnings Caution State"},
		{reflect.TypeOf(infer.EvidenceProbability{}), "P Lo Hi Log10"},
		{reflect.TypeOf(infer.MPE{}), "Assignment P Joint Log10Joint"},
		{reflect.TypeOf(infer.Diagnostics{}), "AcceptanceRate MaxWeightShare RHat ESS"},
		{reflect.TypeOf(sampling.Interval{}), "P Lo Hi"},
		{reflect.TypeOf(sampling.Stop{}), "MaxSamples Timeout AbsErr RelErr Confidence"},
		{reflect.TypeOf(jobs.ModelInfo{}), "Name Version Hash Variables Bytes CreatedAt"},
		// Merged and MergedAdaptive are the workers' working state, deliberately not carried.
		{reflect.TypeOf(jobs.Job{}), "ID Tenant State Priority Query Model Method MethodReason Seed Stop BlockSize Blocks Merged MergedAdaptive MergedBlocks " +
			"Result ResultAt Error IdempotencyKey CreatedAt StartedAt UpdatedAt FinishedAt Deadline Retention"},
	} {
		handled := map[string]bool{}
		for _, f := range strings.Fields(c.handled) {
			handled[f] = true
		}
		for i := 0; i < c.typ.NumField(); i++ {
			f := c.typ.Field(i)
			if f.IsExported() && !handled[f.Name] {
				t.Errorf("%s.%s has no conversion: add it to the proto and to package convert", c.typ, f.Name)
			}
		}
	}
}
