package testnets

import (
	"math/rand/v2"
	"testing"

	"github.com/beliefd/beliefd/service/model"
)

// RandomOptions.Leaves: the last Leaves variables have at least one parent,
// all among the earlier variables, and are no variable's parent, so they
// are leaves of the compiled network (a structural property of the
// option's definition).
func TestRandomLeaves(t *testing.T) {
	for seed := uint64(1); seed <= 20; seed++ {
		o := RandomOptions{Vars: 40, Leaves: 10, MaxParents: 3, MaxStates: 4, Window: 6, ZeroProb: 0.4}
		net, err := model.Compile(Random(rand.New(rand.NewPCG(seed, 5)), o), model.Limits{})
		if err != nil {
			t.Fatalf("seed %d: %v", seed, err)
		}
		first := o.Vars - o.Leaves
		for i := first; i < o.Vars; i++ {
			v := net.Vars[i]
			if len(v.Children) != 0 {
				t.Errorf("seed %d: %s has children %v; want none", seed, v.Name, v.Children)
			}
			if len(v.Parents) == 0 || len(v.Parents) > o.MaxParents {
				t.Errorf("seed %d: %s has %d parents; want 1..%d", seed, v.Name, len(v.Parents), o.MaxParents)
			}
			for _, p := range v.Parents {
				if p >= first {
					t.Errorf("seed %d: %s has parent %s among the leaves", seed, v.Name, net.Vars[p].Name)
				}
			}
		}
	}
}
