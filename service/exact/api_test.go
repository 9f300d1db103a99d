package exact_test

import (
	"errors"
	"math"
	"math/rand/v2"
	"slices"
	"strings"
	"sync"
	"testing"

	"github.com/beliefd/beliefd/service/exact"
	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/model"
)

// TestTooCostly: a dense random model (60 variables of up to 4 states, up
// to 8 parents each, drawn from all earlier variables) has a treewidth far
// beyond any table limit; Compile must refuse it with the estimate.
func TestTooCostly(t *testing.T) {
	rng := rand.New(rand.NewPCG(11, 12))
	net := testnets.MustCompile(testnets.Random(rng, testnets.RandomOptions{Vars: 60, MaxParents: 8, MaxStates: 4}))
	est := exact.EstimateCost(net)
	eng, err := exact.Compile(net, exact.Options{})
	if eng != nil || !errors.Is(err, exact.ErrTooCostly) {
		t.Fatalf("Compile: got %v, %v; want ErrTooCostly", eng, err)
	}
	var tc *exact.TooCostlyError
	if !errors.As(err, &tc) {
		t.Fatalf("error %T does not give a *TooCostlyError", err)
	}
	if tc.Estimate != est || tc.Limit != exact.DefaultMaxEntries || tc.Estimate.TotalEntries <= tc.Limit {
		t.Errorf("estimate %+v, limit %d; EstimateCost gives %+v", tc.Estimate, tc.Limit, est)
	}
	if msg := err.Error(); !strings.Contains(msg, "sampling") || !strings.Contains(msg, "treewidth") {
		t.Errorf("message %q should give the estimate and point to sampling", msg)
	}

	// A small model refused by a small explicit limit carries its own,
	// exact estimate (chest clinic: 40 entries, see TestChestClinicCost).
	chest := testnets.MustCompile(testnets.ChestClinic())
	_, err = exact.Compile(chest, exact.Options{MaxEntries: 39})
	if !errors.As(err, &tc) || tc.Limit != 39 || tc.Estimate.TotalEntries != 40 {
		t.Errorf("chest clinic with limit 39: %v", err)
	}
	if _, err := exact.Compile(chest, exact.Options{MaxEntries: 40}); err != nil {
		t.Errorf("chest clinic with limit 40: %v", err)
	}
}

// TestEstimateLargeSparse: a 3000-variable network with local structure
// (parents within the previous 15 variables) is estimated and compiled; the
// estimate agrees with the engine and the tree has at most one clique per
// variable.
func TestEstimateLargeSparse(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 4))
	net := testnets.MustCompile(testnets.Random(rng, testnets.RandomOptions{Vars: 3000, MaxParents: 3, MaxStates: 3, Window: 15}))
	est := exact.EstimateCost(net)
	if est.Cliques < 1 || est.Cliques > 3000 || est.TotalEntries < est.LargestClique || est.Treewidth < 1 {
		t.Fatalf("implausible estimate %+v", est)
	}
	eng, err := exact.Compile(net, exact.Options{})
	if err != nil {
		t.Fatal(err)
	}
	if eng.Cost() != est {
		t.Errorf("engine cost %+v, estimate %+v", eng.Cost(), est)
	}
}

func TestBadInput(t *testing.T) {
	if _, err := exact.Compile(nil, exact.Options{}); !errors.Is(err, model.ErrInvalid) {
		t.Errorf("nil network: %v", err)
	}
	if c := exact.EstimateCost(nil); c != (exact.Cost{}) {
		t.Errorf("EstimateCost(nil) = %+v", c)
	}
	net := testnets.MustCompile(testnets.ChestClinic())
	broken := *net
	broken.Vars = slices.Clone(net.Vars)
	broken.Vars[3].CPT = broken.Vars[3].CPT[:3]
	if _, err := exact.Compile(&broken, exact.Options{}); !errors.Is(err, model.ErrInvalid) || !strings.Contains(err.Error(), "lung") {
		t.Errorf("short table: %v", err)
	}
	eng, err := exact.Compile(net, exact.Options{})
	if err != nil {
		t.Fatal(err)
	}
	n := len(net.Vars)
	ev := func(f func(e *model.Evidence)) *model.Evidence {
		e := net.NoEvidence()
		f(e)
		return e
	}
	for name, c := range map[string]struct {
		ev      *model.Evidence
		targets []int
		word    string
	}{
		"short hard":      {&model.Evidence{Hard: []int{0}}, nil, "hard evidence"},
		"state too large": {ev(func(e *model.Evidence) { e.Hard[0] = 2 }), nil, "asia"},
		"state below -1":  {ev(func(e *model.Evidence) { e.Hard[1] = -2 }), nil, "smoke"},
		"soft length":     {ev(func(e *model.Evidence) { e.Soft[2] = []float64{1} }), nil, "tub"},
		"soft negative":   {ev(func(e *model.Evidence) { e.Soft[2] = []float64{1, -1} }), nil, "tub"},
		"soft NaN":        {ev(func(e *model.Evidence) { e.Soft[2] = []float64{1, math.NaN()} }), nil, "tub"},
		"soft all zero":   {ev(func(e *model.Evidence) { e.Soft[2] = []float64{0, 0} }), nil, "tub"},
		"target range":    {nil, []int{n}, "target"},
		"target negative": {nil, []int{-1}, "target"},
	} {
		_, err := eng.Posterior(c.ev, c.targets)
		if !errors.Is(err, model.ErrBadEvidence) || !strings.Contains(err.Error(), c.word) {
			t.Errorf("%s: Posterior error %v, want ErrBadEvidence naming %q", name, err, c.word)
		}
		if c.targets == nil {
			if _, err := eng.MPE(c.ev); !errors.Is(err, model.ErrBadEvidence) {
				t.Errorf("%s: MPE error %v, want ErrBadEvidence", name, err)
			}
		}
	}
}

// TestConcurrentQueries runs queries from many goroutines on one engine and
// requires bit-identical answers to the same queries run one at a time.
func TestConcurrentQueries(t *testing.T) {
	rng := rand.New(rand.NewPCG(21, 22))
	net := testnets.MustCompile(testnets.Random(rng, testnets.RandomOptions{Vars: 30, MaxParents: 3, MaxStates: 3}))
	eng, err := exact.Compile(net, exact.Options{})
	if err != nil {
		t.Fatal(err)
	}
	const queries = 40
	evs := make([]*model.Evidence, queries)
	want := make([]*exact.Posterior, queries)
	wantMPE := make([]*exact.MPEResult, queries)
	for i := range evs {
		evs[i] = net.NoEvidence()
		for k := 0; k < 3; k++ {
			v := rng.IntN(len(net.Vars))
			evs[i].Hard[v] = rng.IntN(net.Vars[v].Card())
		}
		want[i], err = eng.Posterior(evs[i], allVars(net))
		if err != nil && !errors.Is(err, exact.ErrZeroEvidence) {
			t.Fatal(err)
		}
		wantMPE[i], _ = eng.MPE(evs[i])
	}
	var wg sync.WaitGroup
	errs := make(chan string, 8*queries)
	for g := 0; g < 8; g++ {
		wg.Add(1)
		go func(g int) {
			defer wg.Done()
			var into exact.Posterior
			for r := 0; r < queries; r++ {
				i := (r + g*5) % queries
				if err := eng.PosteriorInto(&into, evs[i], allVars(net)); (err == nil) != (want[i] != nil) {
					errs <- "error mismatch"
					continue
				} else if err != nil {
					continue
				}
				if into.LogEvidence != want[i].LogEvidence {
					errs <- "log evidence differs"
				}
				for v := range into.Marginals {
					if !slices.Equal(into.Marginals[v], want[i].Marginals[v]) {
						errs <- "marginal differs"
					}
				}
				m, err := eng.MPE(evs[i])
				if err != nil || wantMPE[i] == nil {
					errs <- "MPE failed"
				} else if !slices.Equal(m.Assignment, wantMPE[i].Assignment) || m.LogProb != wantMPE[i].LogProb {
					errs <- "MPE differs"
				}
			}
		}(g)
	}
	wg.Wait()
	close(errs)
	for e := range errs {
		t.Error(e)
	}
}
