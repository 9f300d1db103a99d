package exact_test

import (
	"errors"
	"math"
	"strconv"
	"strings"
	"testing"

	"github.com/beliefd/beliefd/service/exact"
	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/model"
)

func compileDoc(t *testing.T, doc *model.Document) (*model.Network, *exact.Engine) {
	t.Helper()
	net, err := model.Compile(doc, model.Limits{})
	if err != nil {
		t.Fatalf("model: %v", err)
	}
	eng, err := exact.Compile(net, exact.Options{})
	if err != nil {
		t.Fatalf("compile: %v", err)
	}
	return net, eng
}

func mustIndex(t *testing.T, net *model.Network, name string) int {
	t.Helper()
	i, ok := net.Index(name)
	if !ok {
		t.Fatalf("no variable %q", name)
	}
	return i
}

// query returns P(state of each target) given named hard evidence.
func query(t *testing.T, net *model.Network, eng *exact.Engine, hard map[string]string, targets []string) (*exact.Posterior, []int) {
	t.Helper()
	ev, err := net.ResolveEvidence(hard, nil)
	if err != nil {
		t.Fatal(err)
	}
	idx := make([]int, len(targets))
	for i, name := range targets {
		idx[i] = mustIndex(t, net, name)
	}
	post, err := eng.Posterior(ev, idx)
	if err != nil {
		t.Fatalf("posterior given %d observations: %v", len(hard), err)
	}
	return post, idx
}

// TestChestClinic checks the published marginals of the chest-clinic
// network: Lauritzen & Spiegelhalter (1988), "Local computations with
// probabilities on graphical structures and their application to expert
// systems", JRSS-B 50(2):157-224. The values are published to about six
// digits, hence the tolerance of 5e-6 (1e-5 relative for P(e)).
func TestChestClinic(t *testing.T) {
	net, eng := compileDoc(t, testnets.ChestClinic())
	cases := []struct {
		name     string
		evidence map[string]string
		pe       float64 // 0: no evidence
		yes      map[string]float64
	}{
		{"prior", nil, 0, map[string]float64{
			"tub": 0.0104, "lung": 0.055, "bronc": 0.45, "either": 0.064828, "xray": 0.110290, "dysp": 0.435971,
		}},
		{"asia and dyspnoea", map[string]string{"asia": "yes", "dysp": "yes"}, 0.00450138, map[string]float64{
			"tub": 0.087751, "lung": 0.099525, "bronc": 0.811402,
		}},
		{"asia, dyspnoea and x-ray", map[string]string{"asia": "yes", "dysp": "yes", "xray": "yes"}, 0.000988227, map[string]float64{
			"tub": 0.391712, "lung": 0.444271, "bronc": 0.628822,
		}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			var names []string
			for n := range c.yes {
				names = append(names, n)
			}
			post, _ := query(t, net, eng, c.evidence, names)
			for i, n := range names {
				if got := post.Marginals[i][1]; math.Abs(got-c.yes[n]) > 5e-6 {
					t.Errorf("P(%s=yes) = %.7f, published %.6f", n, got, c.yes[n])
				}
			}
			if c.pe == 0 {
				if post.LogEvidence != 0 {
					t.Errorf("LogEvidence without evidence = %g, want 0", post.LogEvidence)
				}
				return
			}
			if pe := math.Exp(post.LogEvidence); math.Abs(pe-c.pe) > 1e-5*c.pe {
				t.Errorf("P(e) = %.9g, published %.6g", pe, c.pe)
			}
			if got, want := post.Log10Evidence(), math.Log10(c.pe); math.Abs(got-want) > 1e-5 {
				t.Errorf("log10 P(e) = %.7f, published value gives %.7f", got, want)
			}
		})
	}
}

// TestChestClinicCost: the moral graph of the chest clinic has one
// chordless cycle, smoke-lung-either-bronc, so a minimal triangulation adds
// a single fill edge and yields six cliques of two or three binary
// variables, as in the junction tree drawn by Lauritzen & Spiegelhalter
// (1988) (clique sizes recalled from memory: 2, 3, 3, 3, 3, 2 variables,
// 4+8+8+8+8+4 = 40 entries).
func TestChestClinicCost(t *testing.T) {
	net := testnets.MustCompile(testnets.ChestClinic())
	got := exact.EstimateCost(net)
	want := exact.Cost{LargestClique: 8, TotalEntries: 40, Cliques: 6, Treewidth: 2}
	if got != want {
		t.Errorf("EstimateCost = %+v, want %+v", got, want)
	}
	eng, err := exact.Compile(net, exact.Options{})
	if err != nil {
		t.Fatal(err)
	}
	if eng.Cost() != got {
		t.Errorf("Engine.Cost = %+v, EstimateCost = %+v", eng.Cost(), got)
	}
}

func basic(name string, p float64) model.Variable {
	return model.Variable{Name: name, States: []string{"ok", "failed"}, Table: [][]float64{{1 - p, p}}}
}

func gate(name, typ string, k int, parents ...string) model.Variable {
	return model.Variable{Name: name, States: []string{"ok", "failed"}, Parents: parents, Gate: &model.Gate{Type: typ, K: k}}
}

// topFailure returns P(top = failed) with no evidence.
func topFailure(t *testing.T, vars ...model.Variable) float64 {
	t.Helper()
	net, eng := compileDoc(t, &model.Document{Name: "fault-tree", Variables: vars})
	post, _ := query(t, net, eng, nil, []string{"top"})
	return post.Marginals[0][1]
}

// TestFaultTreeGates checks top-event probabilities of fault trees built
// from gates against the minimal-cut-set formulas of the NRC Fault Tree
// Handbook (Vesely et al. 1981, NUREG-0492): an OR gate fails with
// probability 1 - prod(1 - p_i), an AND gate with prod(p_i), and for
// independent basic events the top event is the union of its cut sets.
func TestFaultTreeGates(t *testing.T) {
	const tol = 1e-12
	ps := []float64{0.1, 0.25, 0.4}
	orWant, andWant := 1.0, 1.0
	for _, p := range ps {
		orWant *= 1 - p
		andWant *= p
	}
	orWant = 1 - orWant
	events := []model.Variable{basic("a", ps[0]), basic("b", ps[1]), basic("c", ps[2])}
	if got := topFailure(t, append(events, gate("top", model.GateAnyOf, 0, "a", "b", "c"))...); math.Abs(got-orWant) > tol {
		t.Errorf("OR gate: %.15g, want 1-prod(1-p) = %.15g", got, orWant)
	}
	if got := topFailure(t, append(events, gate("top", model.GateAllOf, 0, "a", "b", "c"))...); math.Abs(got-andWant) > tol {
		t.Errorf("AND gate: %.15g, want prod(p) = %.15g", got, andWant)
	}

	// Cut sets {1}, {2}, {3,4,5}, all basic events at 0.5:
	// 1 - 0.5 * 0.5 * (1 - 0.5^3) = 0.78125 exactly.
	got := topFailure(t,
		basic("e1", 0.5), basic("e2", 0.5), basic("e3", 0.5), basic("e4", 0.5), basic("e5", 0.5),
		gate("g345", model.GateAllOf, 0, "e3", "e4", "e5"),
		gate("top", model.GateAnyOf, 0, "e1", "e2", "g345"))
	if got != 0.78125 {
		t.Errorf("cut sets {1},{2},{3,4,5} at 0.5: %.17g, want 0.78125", got)
	}

	// Cut sets {A,B}, {A,C}, {D} at p = 0.1 share A, so the cut sets are
	// not independent: exact value 1 - (1-0.1)(1 - 0.1*(1 - 0.9*0.9)) = 0.1171.
	want := 1 - (1-0.1)*(1-0.1*(1-0.9*0.9))
	got = topFailure(t,
		basic("A", 0.1), basic("B", 0.1), basic("C", 0.1), basic("D", 0.1),
		gate("AB", model.GateAllOf, 0, "A", "B"),
		gate("AC", model.GateAllOf, 0, "A", "C"),
		gate("top", model.GateAnyOf, 0, "AB", "AC", "D"))
	if math.Abs(got-want) > tol || math.Abs(got-0.1171) > tol {
		t.Errorf("cut sets {A,B},{A,C},{D} at 0.1: %.15g, want %.15g (0.1171)", got, want)
	}
}

// TestKOfN checks k-of-n gates against the binomial closed form (common
// practice): 2-of-3 at p = 0.1 is 3 p^2 (1-p) + p^3 = 0.028; at least two
// of three with p = (0.1, 0.2, 0.3) is
// p1p2(1-p3) + p1p3(1-p2) + p2p3(1-p1) + p1p2p3 = 0.098.
func TestKOfN(t *testing.T) {
	const tol = 1e-12
	got := topFailure(t, basic("a", 0.1), basic("b", 0.1), basic("c", 0.1), gate("top", model.GateKOfN, 2, "a", "b", "c"))
	if want := 3*0.1*0.1*0.9 + 0.1*0.1*0.1; math.Abs(got-want) > tol || math.Abs(got-0.028) > tol {
		t.Errorf("2-of-3 at 0.1: %.15g, want %.15g (0.028)", got, want)
	}
	p1, p2, p3 := 0.1, 0.2, 0.3
	got = topFailure(t, basic("a", p1), basic("b", p2), basic("c", p3), gate("top", model.GateKOfN, 2, "a", "b", "c"))
	if want := p1*p2*(1-p3) + p1*p3*(1-p2) + p2*p3*(1-p1) + p1*p2*p3; math.Abs(got-want) > tol || math.Abs(got-0.098) > tol {
		t.Errorf("2-of-3 at (0.1,0.2,0.3): %.15g, want %.15g (0.098)", got, want)
	}
}

// TestNoisyOR checks the leak noisy-OR (Díez 1993 parameterisation,
// P(fault | A) = 1 - (1-leak) prod_{i in A} (1-c_i)) through exact
// posteriors with both parents observed: leak 0.01, links 0.8 and 0.6 give
// 0.01, 0.802, 0.604, 0.9208 for parent states 00, 10, 01, 11.
func TestNoisyOR(t *testing.T) {
	child := model.Variable{Name: "alarm", States: []string{"quiet", "firing"}, Parents: []string{"a", "b"},
		NoisyOR: &model.NoisyOR{Leak: 0.01, Links: map[string]float64{"a": 0.8, "b": 0.6}}}
	net, eng := compileDoc(t, &model.Document{Name: "noisy-or", Variables: []model.Variable{basic("a", 0.3), basic("b", 0.7), child}})
	for _, c := range []struct {
		a, b string
		want float64
	}{
		{"ok", "ok", 0.01}, {"failed", "ok", 0.802}, {"ok", "failed", 0.604}, {"failed", "failed", 0.9208},
	} {
		post, _ := query(t, net, eng, map[string]string{"a": c.a, "b": c.b}, []string{"alarm"})
		if got := post.Marginals[0][1]; math.Abs(got-c.want) > 1e-12 {
			t.Errorf("P(alarm=firing | a=%s, b=%s) = %.15g, want %g", c.a, c.b, got, c.want)
		}
	}
}

// TestZeroEvidence: an AND gate cannot fail while one of its inputs works,
// and an OR gate cannot fail while all inputs work (fault-tree logic,
// common practice). Such evidence must give ErrZeroEvidence, never NaN.
func TestZeroEvidence(t *testing.T) {
	net, eng := compileDoc(t, &model.Document{Name: "and", Variables: []model.Variable{
		basic("a", 0.1), basic("b", 0.2), gate("top", model.GateAllOf, 0, "a", "b"),
	}})
	ev, err := net.ResolveEvidence(map[string]string{"top": "failed", "a": "ok"}, nil)
	if err != nil {
		t.Fatal(err)
	}
	post, err := eng.Posterior(ev, allVars(net))
	if !errors.Is(err, exact.ErrZeroEvidence) || post != nil {
		t.Fatalf("Posterior: got %v, %v; want ErrZeroEvidence", post, err)
	}
	if !strings.Contains(err.Error(), "impossible under the model") {
		t.Errorf("message %q does not say the evidence is impossible", err)
	}
	if res, err := eng.MPE(ev); !errors.Is(err, exact.ErrZeroEvidence) || res != nil {
		t.Errorf("MPE: got %v, %v; want ErrZeroEvidence", res, err)
	}

	// Soft evidence that rules out the only possible state.
	net, eng = compileDoc(t, &model.Document{Name: "or", Variables: []model.Variable{
		basic("a", 0.1), basic("b", 0.2), gate("top", model.GateAnyOf, 0, "a", "b"),
	}})
	ev, err = net.ResolveEvidence(map[string]string{"a": "ok", "b": "ok"}, map[string][]float64{"top": {0, 1}})
	if err != nil {
		t.Fatal(err)
	}
	if _, err := eng.Posterior(ev, []int{mustIndex(t, net, "top")}); !errors.Is(err, exact.ErrZeroEvidence) {
		t.Errorf("soft evidence against the only possible state: got %v, want ErrZeroEvidence", err)
	}
	if _, err := eng.MPE(ev); !errors.Is(err, exact.ErrZeroEvidence) {
		t.Errorf("MPE with soft evidence against the only possible state: got %v, want ErrZeroEvidence", err)
	}
}

// TestTinyEvidenceChain: a chain X0 -> X1 -> ... -> X300 with
// P(X0=yes) = 0.5, P(yes | no) = a, P(no | yes) = b, every even X observed
// "yes" and every odd X hidden. By the Markov property (closed form)
// P(e) = 0.5 * T2^150 with T2 = (1-b)^2 + b*a, the two-step return
// probability, and a hidden X between two "yes" neighbours is "yes" with
// probability (1-b)^2 / T2. With a = 0.001, b = 0.99, P(e) is about
// 1e-444, far below the smallest float64.
func TestTinyEvidenceChain(t *testing.T) {
	const a, b, m = 0.001, 0.99, 150
	vars := []model.Variable{{Name: "x0", States: []string{"no", "yes"}, Table: [][]float64{{0.5, 0.5}}}}
	hard := map[string]string{"x0": "yes"}
	for i := 1; i <= 2*m; i++ {
		name := "x" + strconv.Itoa(i)
		vars = append(vars, model.Variable{Name: name, States: []string{"no", "yes"}, Parents: []string{"x" + strconv.Itoa(i-1)},
			Table: [][]float64{{1 - a, a}, {b, 1 - b}}})
		if i%2 == 0 {
			hard[name] = "yes"
		}
	}
	net, eng := compileDoc(t, &model.Document{Name: "chain", Variables: vars})
	post, _ := query(t, net, eng, hard, []string{"x1", "x151", "x299"})
	t2 := (1-b)*(1-b) + b*a
	want := math.Log(0.5) + m*math.Log(t2)
	if math.Abs(post.LogEvidence-want) > 1e-9*math.Abs(want) {
		t.Errorf("log P(e) = %.12f, closed form %.12f", post.LogEvidence, want)
	}
	if got := post.Log10Evidence(); got > -440 || got < -450 {
		t.Errorf("log10 P(e) = %g, expected about -444", got)
	}
	hidden := (1 - b) * (1 - b) / t2
	for i, m := range post.Marginals {
		if math.Abs(m[1]-hidden) > 1e-12 {
			t.Errorf("hidden target %d: P(yes | e) = %.15g, closed form %.15g", i, m[1], hidden)
		}
	}
}

// TestTinyEvidenceStar: a root X with P(X=yes) = 0.5 and n children, each
// "alarm" with probability q0 when X = no and q1 when X = yes, all observed
// "alarm". Closed form: P(e) = 0.5 (q0^n + q1^n),
// P(X=yes | e) = 1 / (1 + (q0/q1)^n), and the MPE is X = yes with
// probability 0.5 q1^n. With n = 300, q = 0.01 the evidence is about
// 1e-598; with n = 3000, q = 0.5 every message is nearly flat, and their
// product (about 2^-3000) underflows unless tables are rescaled on the way.
func TestTinyEvidenceStar(t *testing.T) {
	for _, c := range []struct {
		n      int
		q0, q1 float64
	}{{300, 0.01, 0.0101}, {3000, 0.5, 0.5001}} {
		vars := []model.Variable{{Name: "x", States: []string{"no", "yes"}, Table: [][]float64{{0.5, 0.5}}}}
		hard := map[string]string{}
		for i := 0; i < c.n; i++ {
			name := "y" + strconv.Itoa(i)
			vars = append(vars, model.Variable{Name: name, States: []string{"quiet", "alarm"}, Parents: []string{"x"},
				Table: [][]float64{{1 - c.q0, c.q0}, {1 - c.q1, c.q1}}})
			hard[name] = "alarm"
		}
		net, eng := compileDoc(t, &model.Document{Name: "star", Variables: vars})
		post, _ := query(t, net, eng, hard, []string{"x"})
		n := float64(c.n)
		l0, l1 := n*math.Log(c.q0), n*math.Log(c.q1)
		want := math.Log(0.5) + l1 + math.Log1p(math.Exp(l0-l1))
		if math.Abs(post.LogEvidence-want) > 1e-9*math.Abs(want) {
			t.Errorf("n=%d: log P(e) = %.12f, closed form %.12f", c.n, post.LogEvidence, want)
		}
		if wantYes := 1 / (1 + math.Exp(l0-l1)); math.Abs(post.Marginals[0][1]-wantYes) > 1e-9 {
			t.Errorf("n=%d: P(x=yes | e) = %.15g, closed form %.15g", c.n, post.Marginals[0][1], wantYes)
		}
		ev, _ := net.ResolveEvidence(hard, nil)
		mpe, err := eng.MPE(ev)
		if err != nil {
			t.Fatalf("n=%d: MPE: %v", c.n, err)
		}
		if x := mustIndex(t, net, "x"); mpe.Assignment[x] != 1 {
			t.Errorf("n=%d: MPE sets x to state %d, want yes", c.n, mpe.Assignment[x])
		}
		if want := math.Log(0.5) + l1; math.Abs(mpe.LogProb-want) > 1e-9*math.Abs(want) {
			t.Errorf("n=%d: MPE LogProb = %.12f, closed form %.12f", c.n, mpe.LogProb, want)
		}
	}
}

// TestMPETies: when every variable is uniform given its parents, all
// complete assignments have probability prod 1/states (closed form), and
// the tie rule picks the lowest state of every variable.
func TestMPETies(t *testing.T) {
	var vars []model.Variable
	for i := 0; i < 8; i++ {
		card := 2 + i%3
		states := make([]string, card)
		for k := range states {
			states[k] = "s" + strconv.Itoa(k)
		}
		var parents []string
		rows := 1
		for _, p := range []int{i - 1, i - 3} {
			if p >= 0 {
				parents = append(parents, "v"+strconv.Itoa(p))
				rows *= 2 + p%3
			}
		}
		table := make([][]float64, rows)
		for r := range table {
			table[r] = make([]float64, card)
			for k := range table[r] {
				table[r][k] = 1 / float64(card)
			}
		}
		vars = append(vars, model.Variable{Name: "v" + strconv.Itoa(i), States: states, Parents: parents, Table: table})
	}
	net, eng := compileDoc(t, &model.Document{Name: "uniform", Variables: vars})
	mpe, err := eng.MPE(nil)
	if err != nil {
		t.Fatal(err)
	}
	want := 0.0
	for v := range net.Vars {
		want -= math.Log(float64(net.Vars[v].Card()))
		if mpe.Assignment[v] != 0 {
			t.Errorf("tie: %s set to state %d, want the lowest (0)", net.Vars[v].Name, mpe.Assignment[v])
		}
	}
	if math.Abs(mpe.LogProb-want) > 1e-12 {
		t.Errorf("LogProb = %.15g, closed form %.15g", mpe.LogProb, want)
	}
}

// TestExtremeLikelihoodRatio: x has children y1, y2, y3; y1 = alarm is
// 1e-310 times as likely under x = yes as under x = no, and y2 = alarm is
// impossible under x = no. Given both alarms, by Bayes' rule (closed form)
// x = yes with certainty, P(y3 = alarm | e) = P(y3 = alarm | x = yes) = 0.7,
// and P(e) = 0.5 * tiny * 0.5. Dividing the distribute message by the
// collect message (about 2e-310, below the smallest normal float64)
// overflows and must not produce NaN. Subnormals near 1e-310 are exact to
// about 5e-324 / 1e-310 = 5e-14 relative, hence the tolerance of 1e-9.
func TestExtremeLikelihoodRatio(t *testing.T) {
	const tiny = 1e-310
	row := func(p float64) []float64 { return []float64{1 - p, p} }
	child := func(name string, pNo, pYes float64) model.Variable {
		return model.Variable{Name: name, States: []string{"quiet", "alarm"}, Parents: []string{"x"}, Table: [][]float64{row(pNo), row(pYes)}}
	}
	net, eng := compileDoc(t, &model.Document{Name: "extreme", Variables: []model.Variable{
		{Name: "x", States: []string{"no", "yes"}, Table: [][]float64{row(0.5)}},
		child("y1", 0.5, tiny), child("y2", 0, 0.5), child("y3", 0.3, 0.7),
	}})
	post, _ := query(t, net, eng, map[string]string{"y1": "alarm", "y2": "alarm"}, []string{"x", "y3"})
	if x := post.Marginals[0]; x[0] != 0 || math.Abs(x[1]-1) > 1e-9 {
		t.Errorf("P(x | e) = %v, want [0 1]", x)
	}
	if y3 := post.Marginals[1]; math.Abs(y3[1]-0.7) > 1e-9 || math.Abs(y3[0]-0.3) > 1e-9 {
		t.Errorf("P(y3 | e) = %v, want [0.3 0.7]", y3)
	}
	// log(tiny) through log2: math.Log is inaccurate for subnormal
	// arguments on amd64 (it returns about -709.09 for all of them).
	want := 2*math.Log(0.5) + math.Log2(tiny)*math.Ln2
	if math.Abs(post.LogEvidence-want) > 1e-9*math.Abs(want) {
		t.Errorf("log P(e) = %.12f, closed form %.12f", post.LogEvidence, want)
	}
}

// TestSubnormalEvidenceInChain: a chain x1 -> x2 -> x3 -> x4 -> x5 where
// x3 = on has probability tiny = 1e-310 whatever x2 is. Observing x3 = on
// gives (closed form, by the chain's Markov property) P(e) = tiny,
// P(x1 | e) and P(x2 | e) equal to the priors, P(x4 = on | e) = P(x4 = on | x3 = on)
// and P(x5 = on | e) = sum_x4 P(x4 | x3 = on) P(x5 = on | x4). The clique
// holding x3's table then sums to a subnormal number, whose reciprocal
// overflows; normalising by it must still give finite, correct answers.
func TestSubnormalEvidenceInChain(t *testing.T) {
	const tiny = 1e-310
	row := func(p float64) []float64 { return []float64{1 - p, p} }
	node := func(name, parent string, pOff, pOn float64) model.Variable {
		return model.Variable{Name: name, States: []string{"off", "on"}, Parents: []string{parent}, Table: [][]float64{row(pOff), row(pOn)}}
	}
	net, eng := compileDoc(t, &model.Document{Name: "chain", Variables: []model.Variable{
		{Name: "x1", States: []string{"off", "on"}, Table: [][]float64{row(0.3)}},
		node("x2", "x1", 0.2, 0.9),
		node("x3", "x2", tiny, tiny),
		node("x4", "x3", 0.25, 0.6),
		node("x5", "x4", 0.1, 0.8),
	}})
	post, _ := query(t, net, eng, map[string]string{"x3": "on"}, []string{"x1", "x2", "x4", "x5"})
	want := []float64{0.3, 0.7*0.2 + 0.3*0.9, 0.6, 0.4*0.1 + 0.6*0.8}
	for i, w := range want {
		if got := post.Marginals[i][1]; math.Abs(got-w) > 1e-9 || math.IsNaN(got) {
			t.Errorf("target %d: P(on | e) = %.15g, closed form %.15g", i, got, w)
		}
	}
	// math.Log is inaccurate for subnormal arguments on amd64; go through log2.
	if lw := math.Log2(tiny) * math.Ln2; math.Abs(post.LogEvidence-lw) > 1e-9*math.Abs(lw) {
		t.Errorf("log P(e) = %.12f, closed form %.12f", post.LogEvidence, lw)
	}
}
