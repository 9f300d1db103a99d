package adaptive_test

import (
	"context"
	"errors"
	"math/rand/v2"
	"strings"
	"testing"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/model"
)

// Method "auto" on a network too large for exact inference (the limit is
// set low): unlikely evidence or a rare target state picks adaptive
// importance sampling, with the pilot's numbers in the reason; neither
// picks likelihood weighting. The thresholds are the product's (P(evidence)
// below 1e-4, a named target's state below 1e-3).
func TestAutoChoice(t *testing.T) {
	ft := testnets.FaultTree(rand.New(rand.NewPCG(1, 2)), testnets.FaultTreeOptions{Trains: 3, Components: 8})
	net := testnets.MustCompile(ft.Doc)
	r := infer.NewRunner(infer.Options{ExactMaxEntries: 10, Workers: 2})
	seed := uint64(7)
	// In this generated network the top event (2 of 3 trains) is below
	// 1e-6, and two train alarms firing has probability below 1e-4
	// (components fail with probability 1e-5..1e-3, false alarms 1e-4..1e-2).
	cases := []struct {
		name   string
		q      infer.Query
		method string
		reason string
	}{
		{"unlikely evidence", infer.Query{Evidence: map[string]string{ft.Alarms[0]: "firing", ft.Alarms[1]: "firing"}, Targets: []string{ft.Trains[2]}},
			infer.MethodAdaptive, "unlikely evidence"},
		{"rare target", infer.Query{Targets: []string{ft.Top}}, infer.MethodAdaptive, "rare target state"},
		{"named rare target", infer.Query{Targets: []string{ft.Top}, Adaptive: &infer.AdaptiveOptions{RareTargets: []string{ft.Top}}},
			infer.MethodAdaptive, "names rare targets"},
		{"ordinary", infer.Query{}, infer.MethodLikelihoodWeighting, "neither unlikely evidence nor rare target states"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			q := c.q
			q.Seed = &seed
			q.Stop = infer.StopRule{MaxSamples: 4000}
			res, err := r.Run(context.Background(), net, &q, nil)
			if err != nil {
				t.Fatal(err)
			}
			if res.Method != c.method || !strings.Contains(res.MethodReason, c.reason) {
				t.Errorf("method %q, reason %q; want %q because of %q", res.Method, res.MethodReason, c.method, c.reason)
			}
			if c.method == infer.MethodLikelihoodWeighting {
				return
			}
			if !strings.Contains(res.MethodReason, "pilot") && c.name != "named rare target" {
				t.Errorf("reason %q does not give the pilot's numbers", res.MethodReason)
			}
			for name, m := range res.Marginals {
				for st, iv := range m {
					if iv.Lo > iv.P || iv.P > iv.Hi {
						t.Errorf("%s=%s: %+v is not an interval around its estimate", name, st, iv)
					}
				}
			}
		})
	}
}

// Bad adaptive options in a query are refused with errors naming them.
func TestQueryOptionErrors(t *testing.T) {
	net := testnets.MustCompile(testnets.ChestClinic())
	r := infer.NewRunner(infer.Options{})
	for _, c := range []struct {
		q    infer.Query
		want error
	}{
		{infer.Query{Method: infer.MethodAdaptive, Targets: []string{"tub"}, Adaptive: &infer.AdaptiveOptions{RareTargets: []string{"lung"}}}, model.ErrBadEvidence},
		{infer.Query{Method: infer.MethodAdaptive, Adaptive: &infer.AdaptiveOptions{RareTargets: []string{"nope"}}}, model.ErrBadEvidence},
		{infer.Query{Method: infer.MethodAdaptive, Adaptive: &infer.AdaptiveOptions{EpsDelta: &infer.EpsDeltaRule{Epsilon: 2, Delta: 0.1}}}, infer.ErrBadQuery},
		{infer.Query{Method: infer.MethodLikelihoodWeighting, Adaptive: &infer.AdaptiveOptions{}}, infer.ErrBadQuery},
	} {
		q := c.q
		if _, err := r.Run(context.Background(), net, &q, nil); !errors.Is(err, c.want) {
			t.Errorf("query %+v: error %v, want %v", c.q, err, c.want)
		}
	}
}
