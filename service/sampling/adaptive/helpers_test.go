package adaptive

import (
	"context"
	"fmt"
	"math"
	"testing"

	"github.com/beliefd/beliefd/service/exact"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
	"gonum.org/v1/gonum/stat/distuv"
)

// z999 is the two-sided 99.9% normal quantile: a single check at this
// level fails by chance with probability 0.001.
var z999 = distuv.UnitNormal.Quantile(0.9995)

var okFailed = []string{"ok", "failed"}

func root(name string, p float64) model.Variable {
	return model.Variable{Name: name, States: okFailed, Table: [][]float64{{1 - p, p}}}
}

func compile(t testing.TB, doc *model.Document) *model.Network {
	t.Helper()
	net, err := model.Compile(doc, model.Limits{})
	if err != nil {
		t.Fatal(err)
	}
	return net
}

func index(t testing.TB, net *model.Network, name string) int {
	t.Helper()
	v, ok := net.Index(name)
	if !ok {
		t.Fatalf("no variable %q", name)
	}
	return v
}

func evidence(t testing.TB, net *model.Network, hard map[string]string) *model.Evidence {
	t.Helper()
	ev, err := net.ResolveEvidence(hard, nil)
	if err != nil {
		t.Fatal(err)
	}
	return ev
}

// gateNet is n roots with the given failure probabilities under one gate
// (or noisy-OR) called "top".
func gateNet(ps []float64, top model.Variable) *model.Document {
	doc := &model.Document{Name: "gate"}
	for i, p := range ps {
		name := fmt.Sprintf("c%d", i)
		doc.Variables = append(doc.Variables, root(name, p))
		top.Parents = append(top.Parents, name)
	}
	top.Name, top.States = "top", okFailed
	doc.Variables = append(doc.Variables, top)
	return doc
}

// exactPosterior answers by the junction tree of service/exact.
func exactPosterior(t testing.TB, net *model.Network, ev *model.Evidence, targets []int) *exact.Posterior {
	t.Helper()
	eng, err := exact.Compile(net, exact.Options{})
	if err != nil {
		t.Fatal(err)
	}
	post, err := eng.Posterior(ev, targets)
	if err != nil {
		t.Fatal(err)
	}
	return post
}

func run(t testing.TB, net *model.Network, ev *model.Evidence, targets []int, o Options) *Result {
	t.Helper()
	res, err := Run(context.Background(), net, ev, targets, o)
	if err != nil {
		t.Fatal(err)
	}
	return res
}

// covers reports whether iv contains x, allowing a relative 1e-12 for the
// rounding of exact answers computed in another order.
func covers(iv sampling.Interval, x float64) bool {
	slack := 1e-12 * math.Abs(x)
	return iv.Lo-slack <= x && x <= iv.Hi+slack
}

// binomialBand is the central interval [lo, hi] of a Binomial(n, p)
// count with at most (1-conf)/2 probability on each side, from gonum's CDF.
func binomialBand(n int, p, conf float64) (lo, hi int) {
	b := distuv.Binomial{N: float64(n), P: p}
	a := (1 - conf) / 2
	lo = 0
	for lo < n && b.CDF(float64(lo)) < a { // ends with P(X < lo) < a
		lo++
	}
	hi = n
	for hi > 0 && b.Survival(float64(hi-1)) < a { // ends with P(X > hi) < a
		hi--
	}
	return lo, hi
}
