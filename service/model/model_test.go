package model_test

import (
	"errors"
	"math"
	"strings"
	"testing"

	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/model"
)

func yn() []string { return []string{"ok", "failed"} }

func root(name string, p float64) model.Variable {
	return model.Variable{Name: name, States: yn(), Table: [][]float64{{1 - p, p}}}
}

func compile(t *testing.T, vars ...model.Variable) *model.Network {
	t.Helper()
	net, err := model.Compile(&model.Document{Name: "t", Variables: vars}, model.Limits{})
	if err != nil {
		t.Fatalf("compile: %v", err)
	}
	return net
}

func fault(net *model.Network, name string, row int) float64 {
	i, _ := net.Index(name)
	return net.Vars[i].Row(row)[1]
}

// Noisy-OR closed form with the leak as an independent cause (Díez 1993):
// P(y | active set A) = 1 - (1-leak) * prod_{i in A} (1-c_i).
// leak 0.01, links 0.8 and 0.6 give 0.01, 0.802, 0.604, 0.9208 for parent
// configurations 00, 10, 01, 11.
func TestNoisyORClosedForm(t *testing.T) {
	net := compile(t, root("a", 0.5), root("b", 0.5), model.Variable{
		Name: "y", States: yn(), Parents: []string{"a", "b"},
		NoisyOR: &model.NoisyOR{Leak: 0.01, Links: map[string]float64{"a": 0.8, "b": 0.6}},
	})
	// Rows: last parent fastest: (a,b) = 00, 01, 10, 11.
	want := map[int]float64{0: 0.01, 1: 0.604, 2: 0.802, 3: 0.9208}
	for r, w := range want {
		if got := fault(net, "y", r); math.Abs(got-w) > 1e-12 {
			t.Errorf("row %d: P(y=failed) = %.12g, want %g", r, got, w)
		}
	}
}

// Noisy-MAX with a binary child reduces to noisy-OR (Díez 1993), and with
// three ordered levels the CDF is the product of the causes' CDFs.
func TestNoisyMAX(t *testing.T) {
	lvl := []string{"ok", "degraded", "down"}
	net := compile(t,
		model.Variable{Name: "a", States: lvl, Table: [][]float64{{0.7, 0.2, 0.1}}},
		root("b", 0.3),
		model.Variable{Name: "y", States: lvl, Parents: []string{"a", "b"}, NoisyMAX: &model.NoisyMAX{
			Leak: []float64{0.9, 0.08, 0.02},
			Links: map[string]map[string][]float64{
				"a": {"degraded": {0.5, 0.4, 0.1}, "down": {0.1, 0.3, 0.6}},
				"b": {"failed": {0.2, 0.5, 0.3}},
			},
		}})
	y, _ := net.Index("y")
	node := &net.Vars[y]
	// Row for a=down (2), b=failed (1): 2*2+1 = 5.
	// CDF(ok) = 0.9*0.1*0.2 = 0.018; CDF(degraded) = 0.98*0.4*0.7 = 0.2744.
	row := node.Row(5)
	want := []float64{0.018, 0.2744 - 0.018, 1 - 0.2744}
	for k := range want {
		if math.Abs(row[k]-want[k]) > 1e-12 {
			t.Errorf("a=down,b=failed: P(%s) = %.12g, want %.12g", lvl[k], row[k], want[k])
		}
	}
	// Both parents normal: the leak alone.
	for k, w := range []float64{0.9, 0.08, 0.02} {
		if math.Abs(node.Row(0)[k]-w) > 1e-12 {
			t.Errorf("no cause: P(%s) = %g, want %g", lvl[k], node.Row(0)[k], w)
		}
	}
}

// Fault-tree gates (NRC Fault Tree Handbook, NUREG-0492, ch. VI): an OR
// gate is failed when any input is, AND when all are; k-of-n when at least k.
func TestGates(t *testing.T) {
	vars := []model.Variable{root("a", 0.1), root("b", 0.1), root("c", 0.1)}
	for _, tc := range []struct {
		gate model.Gate
		want func(failed int) bool
	}{
		{model.Gate{Type: model.GateAnyOf}, func(f int) bool { return f >= 1 }},
		{model.Gate{Type: model.GateAllOf}, func(f int) bool { return f == 3 }},
		{model.Gate{Type: model.GateKOfN, K: 2}, func(f int) bool { return f >= 2 }},
	} {
		g := tc.gate
		net := compile(t, append(vars, model.Variable{Name: "top", States: yn(), Parents: []string{"a", "b", "c"}, Gate: &g})...)
		for r := 0; r < 8; r++ {
			failed := (r>>2)&1 + (r>>1)&1 + r&1
			want := 0.0
			if tc.want(failed) {
				want = 1
			}
			if got := fault(net, "top", r); got != want {
				t.Errorf("%s k=%d row %d: %g, want %g", g.Type, g.K, r, got, want)
			}
		}
	}
}

// A constant failure rate over a mission time: p = 1 - exp(-lambda t)
// (common practice; NUREG-0492 ch. XI for the exponential model).
func TestFailureRate(t *testing.T) {
	net := compile(t, model.Variable{Name: "pump", States: yn(), FailureRate: &model.FailureRate{Lambda: 1e-4, MissionTime: 1000}})
	want := 1 - math.Exp(-0.1)
	if got := fault(net, "pump", 0); math.Abs(got-want) > 1e-15 {
		t.Errorf("p = %.17g, want %.17g", got, want)
	}
	tiny := compile(t, model.Variable{Name: "x", States: yn(), FailureRate: &model.FailureRate{Lambda: 1e-12, MissionTime: 1}})
	if got := fault(tiny, "x", 0); math.Abs(got-1e-12)/1e-12 > 1e-9 {
		t.Errorf("tiny rate lost precision: %g", got)
	}
}

func TestKeyedRowsEqualTable(t *testing.T) {
	table := compile(t, root("a", 0.2), root("b", 0.3), model.Variable{Name: "y", States: yn(), Parents: []string{"a", "b"},
		Table: [][]float64{{0.9, 0.1}, {0.8, 0.2}, {0.7, 0.3}, {0.6, 0.4}}})
	keyed := compile(t, root("a", 0.2), root("b", 0.3), model.Variable{Name: "y", States: yn(), Parents: []string{"a", "b"},
		Rows: []model.KeyedRow{
			{Given: map[string]string{"a": "failed", "b": "failed"}, P: []float64{0.6, 0.4}},
			{Given: map[string]string{"a": "ok", "b": "ok"}, P: []float64{0.9, 0.1}},
			{Given: map[string]string{"a": "failed", "b": "ok"}, P: []float64{0.7, 0.3}},
			{Given: map[string]string{"a": "ok", "b": "failed"}, P: []float64{0.8, 0.2}},
		}})
	if table.Hash != keyed.Hash {
		t.Errorf("keyed rows and table give different hashes")
	}
}

func TestTopologicalOrderAndHash(t *testing.T) {
	// Children listed before parents still compile; the hash does not depend
	// on document order of independent variables or on the model name.
	a := compile(t, model.Variable{Name: "y", States: yn(), Parents: []string{"x"}, Table: [][]float64{{0.9, 0.1}, {0.2, 0.8}}}, root("x", 0.3))
	if a.Vars[0].Name != "x" || a.Vars[1].Name != "y" {
		t.Fatalf("order %s, %s", a.Vars[0].Name, a.Vars[1].Name)
	}
	if a.DocOrder[0] != 1 || a.DocOrder[1] != 0 {
		t.Errorf("DocOrder = %v", a.DocOrder)
	}
	b := compile(t, root("x", 0.3), model.Variable{Name: "y", States: yn(), Parents: []string{"x"}, Table: [][]float64{{0.9, 0.1}, {0.2, 0.8}}})
	if a.Hash != b.Hash {
		t.Errorf("same model, different hash")
	}
	c := compile(t, root("x", 0.3), model.Variable{Name: "y", States: yn(), Parents: []string{"x"}, Table: [][]float64{{0.9, 0.1}, {0.25, 0.75}}})
	if c.Hash == b.Hash {
		t.Errorf("different tables, same hash")
	}
	cc := testnets.MustCompile(testnets.ChestClinic())
	if cc.Arcs != 8 || len(cc.Vars) != 8 || cc.FreeParameters() != 18 {
		t.Errorf("chest clinic: %d arcs, %d vars, %d free parameters; want 8, 8, 18", cc.Arcs, len(cc.Vars), cc.FreeParameters())
	}
}

func TestValidationCatalogue(t *testing.T) {
	nan := math.NaN()
	y := func(mod func(v *model.Variable)) []model.Variable {
		v := model.Variable{Name: "y", States: yn(), Parents: []string{"x"}, Table: [][]float64{{0.9, 0.1}, {0.2, 0.8}}}
		mod(&v)
		return []model.Variable{root("x", 0.3), v}
	}
	cases := []struct {
		name  string
		vars  []model.Variable
		lim   model.Limits
		want  []string // substrings of the message
		large bool
	}{
		{"no variables", nil, model.Limits{}, []string{"no variables"}, false},
		{"cycle", []model.Variable{
			{Name: "a", States: yn(), Parents: []string{"c"}, Table: [][]float64{{1, 0}, {0, 1}}},
			{Name: "b", States: yn(), Parents: []string{"a"}, Table: [][]float64{{1, 0}, {0, 1}}},
			{Name: "c", States: yn(), Parents: []string{"b"}, Table: [][]float64{{1, 0}, {0, 1}}},
		}, model.Limits{}, []string{"cycle: ", "a -> b -> c -> a"}, false},
		{"self parent", y(func(v *model.Variable) { v.Parents = []string{"y"} }), model.Limits{}, []string{`"y"`, "own parent"}, false},
		{"unknown parent", y(func(v *model.Variable) { v.Parents = []string{"z"} }), model.Limits{}, []string{`unknown parent "z"`}, false},
		{"duplicate name", []model.Variable{root("x", 0.1), root("x", 0.2)}, model.Limits{}, []string{`"x"`, "duplicate variable name"}, false},
		{"duplicate state", y(func(v *model.Variable) { v.States = []string{"ok", "ok"} }), model.Limits{}, []string{`duplicate state "ok"`}, false},
		{"empty states", y(func(v *model.Variable) { v.States = nil }), model.Limits{}, []string{"no states"}, false},
		{"one state", y(func(v *model.Variable) { v.States = []string{"ok"} }), model.Limits{}, []string{"at least two states"}, false},
		{"wrong row count", y(func(v *model.Variable) { v.Table = v.Table[:1] }), model.Limits{}, []string{`"y"`, "1 rows given, want 2", "x:2"}, false},
		{"row sum", y(func(v *model.Variable) { v.Table[1] = []float64{0.2, 0.7} }), model.Limits{}, []string{"row 1 (x=failed)", "sums to 0.9"}, false},
		{"negative", y(func(v *model.Variable) { v.Table[0] = []float64{1.1, -0.1} }), model.Limits{}, []string{"row 0", "outside [0, 1]"}, false},
		{"NaN", y(func(v *model.Variable) { v.Table[0] = []float64{nan, 0.1} }), model.Limits{}, []string{"is NaN"}, false},
		{"Inf", y(func(v *model.Variable) { v.Table[0] = []float64{math.Inf(1), 0.1} }), model.Limits{}, []string{"is infinite"}, false},
		{"short row", y(func(v *model.Variable) { v.Table[0] = []float64{1} }), model.Limits{}, []string{"has 1 values, want one per state (2)"}, false},
		{"no distribution", y(func(v *model.Variable) { v.Table = nil }), model.Limits{}, []string{"no distribution"}, false},
		{"two distributions", y(func(v *model.Variable) { v.Gate = &model.Gate{Type: model.GateAnyOf} }), model.Limits{}, []string{"more than one distribution", "table, gate"}, false},
		{"bad gate", y(func(v *model.Variable) { v.Table = nil; v.Gate = &model.Gate{Type: "xor"} }), model.Limits{}, []string{`unknown gate type "xor"`}, false},
		{"bad k", y(func(v *model.Variable) { v.Table = nil; v.Gate = &model.Gate{Type: model.GateKOfN, K: 3} }), model.Limits{}, []string{"1 <= k <= 1", "k = 3"}, false},
		{"noisy-or link missing", y(func(v *model.Variable) {
			v.Table = nil
			v.NoisyOR = &model.NoisyOR{Leak: 0.1, Links: map[string]float64{}}
		}), model.Limits{}, []string{`no link given for parent "x"`}, false},
		{"noisy-or link foreign", y(func(v *model.Variable) {
			v.Table = nil
			v.NoisyOR = &model.NoisyOR{Leak: 0.1, Links: map[string]float64{"x": 0.5, "q": 0.1}}
		}), model.Limits{}, []string{`"q", which is not a parent`}, false},
		{"noisy-or three states", y(func(v *model.Variable) {
			v.Table = nil
			v.States = []string{"a", "b", "c"}
			v.NoisyOR = &model.NoisyOR{Leak: 0.1, Links: map[string]float64{"x": 0.5}}
		}), model.Limits{}, []string{"exactly two states"}, false},
		{"rate with parents", y(func(v *model.Variable) { v.Table = nil; v.FailureRate = &model.FailureRate{Lambda: 1, MissionTime: 1} }), model.Limits{}, []string{"root event"}, false},
		{"negative rate", []model.Variable{{Name: "r", States: yn(), FailureRate: &model.FailureRate{Lambda: -1, MissionTime: 1}}}, model.Limits{}, []string{"lambda = -1"}, false},
		{"unknown fault state", y(func(v *model.Variable) { v.FaultStates = []string{"broken"} }), model.Limits{}, []string{`unknown state "broken"`}, false},
		{"too many states", y(func(v *model.Variable) {
			v.States = make([]string, 10000)
			for i := range v.States {
				v.States[i] = strings.Repeat("s", 1+i%7) + string(rune('a'+i%26)) + string(rune('a'+i/26%26)) + string(rune('a'+i/676))
			}
		}), model.Limits{}, []string{"10000 states exceed the limit of 512"}, true},
		{"too many variables", []model.Variable{root("a", 0.1), root("b", 0.1)}, model.Limits{MaxVariables: 1}, []string{"2 variables exceed the limit of 1"}, true},
		{"table too large", func() []model.Variable {
			var vs []model.Variable
			var ps []string
			for i := 0; i < 30; i++ {
				n := string(rune('a'+i%26)) + strings.Repeat("x", i/26)
				vs = append(vs, root(n, 0.1))
				ps = append(ps, n)
			}
			return append(vs, model.Variable{Name: "big", States: yn(), Parents: ps, Gate: &model.Gate{Type: model.GateAnyOf}})
		}(), model.Limits{}, []string{`"big"`, "more than the limit of 20000000 entries"}, true},
		{"keyed missing row", y(func(v *model.Variable) {
			v.Table = nil
			v.Rows = []model.KeyedRow{{Given: map[string]string{"x": "ok"}, P: []float64{0.5, 0.5}}}
		}), model.Limits{}, []string{"no row for the configuration x=failed"}, false},
		{"keyed bad state", y(func(v *model.Variable) {
			v.Table = nil
			v.Rows = []model.KeyedRow{{Given: map[string]string{"x": "on"}, P: []float64{0.5, 0.5}}}
		}), model.Limits{}, []string{`parent "x" has no state "on"`}, false},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			_, err := model.Compile(&model.Document{Variables: tc.vars}, tc.lim)
			if err == nil {
				t.Fatal("no error")
			}
			if !errors.Is(err, model.ErrInvalid) {
				t.Errorf("error does not wrap ErrInvalid: %v", err)
			}
			if errors.Is(err, model.ErrTooLarge) != tc.large {
				t.Errorf("ErrTooLarge = %v, want %v: %v", !tc.large, tc.large, err)
			}
			var ve *model.ValidationError
			if !errors.As(err, &ve) || len(ve.Problems) == 0 {
				t.Errorf("not a *ValidationError with problems: %v", err)
			}
			for _, w := range tc.want {
				if !strings.Contains(err.Error(), w) {
					t.Errorf("message %q does not contain %q", err.Error(), w)
				}
			}
		})
	}
}

func TestDecode(t *testing.T) {
	good := `{"name":"m","variables":[{"name":"x","states":["ok","failed"],"table":[[0.9,0.1]]}]}`
	if _, err := model.DecodeBytes([]byte(good)); err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct{ doc, want string }{
		{``, "empty document"},
		{`{"variables": [`, "ends early"},
		{`{"variables": [{"name": "x", "colour": "red"}]}`, `unknown field "colour"`},
		{`{"variables": 3}`, `field "variables"`},
		{good + ` {}`, "unexpected data after the document"},
		{"{\n  \"variables\": [}\n", "line 2"},
	} {
		_, err := model.DecodeBytes([]byte(tc.doc))
		if err == nil || !errors.Is(err, model.ErrMalformed) || !strings.Contains(err.Error(), tc.want) {
			t.Errorf("decode %q: error %v, want ErrMalformed containing %q", tc.doc, err, tc.want)
		}
	}
	_, err := model.Decode(strings.NewReader(good), 10)
	if err == nil || !strings.Contains(err.Error(), "larger than 10 bytes") {
		t.Errorf("size limit: %v", err)
	}
}

func TestEvidence(t *testing.T) {
	net := testnets.MustCompile(testnets.ChestClinic())
	ev, err := net.ResolveEvidence(map[string]string{"asia": "yes"}, map[string][]float64{"xray": {0.2, 0.9}})
	if err != nil {
		t.Fatal(err)
	}
	a, _ := net.Index("asia")
	x, _ := net.Index("xray")
	if ev.Hard[a] != 1 || ev.Soft[x][1] != 0.9 || ev.Empty() || !ev.HasSoft() {
		t.Errorf("resolved evidence wrong: %+v", ev)
	}
	for _, tc := range []struct {
		hard map[string]string
		soft map[string][]float64
		want string
	}{
		{map[string]string{"Asia": "yes"}, nil, `unknown variable "Asia" (did you mean "asia"?)`},
		{map[string]string{"asia": "maybe"}, nil, `no state "maybe" (states: no, yes)`},
		{nil, map[string][]float64{"xray": {1}}, "has 1 likelihoods, want one per state (2"},
		{nil, map[string][]float64{"xray": {0, 0}}, "zero for every state"},
		{nil, map[string][]float64{"xray": {-1, 1}}, "must be finite and >= 0"},
		{map[string]string{"xray": "yes"}, map[string][]float64{"xray": {1, 1}}, "both hard and soft"},
	} {
		_, err := net.ResolveEvidence(tc.hard, tc.soft)
		if err == nil || !errors.Is(err, model.ErrBadEvidence) || !strings.Contains(err.Error(), tc.want) {
			t.Errorf("evidence %v %v: %v, want ErrBadEvidence containing %q", tc.hard, tc.soft, err, tc.want)
		}
	}
	tg, err := net.ResolveTargets(nil, ev)
	if err != nil || len(tg) != 7 {
		t.Errorf("default targets: %v %v", tg, err)
	}
	if _, err := net.ResolveTargets([]string{"nope"}, ev); err == nil {
		t.Error("unknown target accepted")
	}
}
