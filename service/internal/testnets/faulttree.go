package testnets

import (
	"fmt"
	"math"
	"math/rand/v2"

	"github.com/beliefd/beliefd/service/model"
)

// FaultTreeOptions shape FaultTree. Zero fields take the defaults in
// parentheses.
type FaultTreeOptions struct {
	// Trains is the number of redundant trains (4). Each train is a tree of
	// gates over its own components.
	Trains int
	// Components per train (30): root events with failure probabilities
	// drawn log-uniformly in [MinP, MaxP].
	Components int
	// MinP and MaxP bound the components' failure probabilities (1e-5, 1e-3).
	MinP, MaxP float64
	// Needed is how many trains must fail for the top event (k-of-n over the
	// trains; default Trains-1, so the top event is rare).
	Needed int
	// CommonCauses is the number of common-cause roots (2), each feeding
	// every train through a noisy-OR link, with probabilities in
	// [CommonMinP, CommonMaxP] (1e-7, 1e-6). They make the network loopy.
	CommonCauses           int
	CommonMinP, CommonMaxP float64
	// Alarms is the number of noisy alarms (Trains*8), each watching one
	// component or gate, with a false-alarm rate in [1e-4, 1e-2] and a miss
	// rate in [0.01, 0.1].
	Alarms int
}

// FaultTreeNet is a generated failure-propagation model with the names a
// test or benchmark needs.
type FaultTreeNet struct {
	Doc *model.Document
	// Top is the top event (states "ok", "failed").
	Top string
	// Trains are the train-level events, in order.
	Trains []string
	// Alarms are the alarm variables (states "quiet", "firing"), and
	// Watched[i] is the variable alarm i watches.
	Alarms  []string
	Watched []string
}

// FaultTree generates a failure-propagation network: redundant trains, each
// a tree of any_of / all_of / k_of_n / noisy-OR gates over rare component
// failures (failure_rate roots and table roots), common-cause roots feeding
// every train, a k-of-n top event over the trains, and noisy alarms with
// false-alarm and miss rates. Gates take their inputs from a short window
// of not yet used events, and some components feed two gates, so the
// network has loops but a small treewidth: exact inference stays cheap
// while sampling sees a top event around 1e-6..1e-12.
func FaultTree(rng *rand.Rand, o FaultTreeOptions) *FaultTreeNet {
	if o.Trains <= 0 {
		o.Trains = 4
	}
	if o.Components <= 0 {
		o.Components = 30
	}
	if o.MinP <= 0 {
		o.MinP = 1e-5
	}
	if o.MaxP <= 0 {
		o.MaxP = 1e-3
	}
	if o.Needed <= 0 || o.Needed > o.Trains {
		o.Needed = max(1, o.Trains-1)
	}
	if o.CommonCauses < 0 {
		o.CommonCauses = 0
	} else if o.CommonCauses == 0 {
		o.CommonCauses = 2
	}
	if o.CommonMinP <= 0 {
		o.CommonMinP = 1e-7
	}
	if o.CommonMaxP <= 0 {
		o.CommonMaxP = 1e-6
	}
	if o.Alarms <= 0 {
		o.Alarms = 8 * o.Trains
	}
	okFailed := []string{"ok", "failed"}
	ft := &FaultTreeNet{Doc: &model.Document{Name: fmt.Sprintf("fault-tree-%d", o.Trains*o.Components)}}
	add := func(v model.Variable) { ft.Doc.Variables = append(ft.Doc.Variables, v) }
	logU := func(lo, hi float64) float64 {
		return math.Exp(math.Log(lo) + rng.Float64()*(math.Log(hi)-math.Log(lo)))
	}
	var events []string // every component and gate, for the alarms
	var common []string
	for c := 0; c < o.CommonCauses; c++ {
		name := fmt.Sprintf("common_cause_%d", c)
		p := logU(o.CommonMinP, o.CommonMaxP)
		add(model.Variable{Name: name, States: okFailed, Table: [][]float64{{1 - p, p}}})
		common = append(common, name)
	}
	for t := 0; t < o.Trains; t++ {
		var pool []string // events not yet used as a gate input
		for c := 0; c < o.Components; c++ {
			name := fmt.Sprintf("t%d_component_%d", t, c)
			p := logU(o.MinP, o.MaxP)
			if rng.IntN(2) == 0 {
				// p = 1 - exp(-λ t) with a mission time of 24 hours.
				add(model.Variable{Name: name, States: okFailed, FailureRate: &model.FailureRate{Lambda: -math.Log1p(-p) / 24, MissionTime: 24}})
			} else {
				add(model.Variable{Name: name, States: okFailed, Table: [][]float64{{1 - p, p}}})
			}
			pool = append(pool, name)
			events = append(events, name)
		}
		g := 0
		for len(pool) > 1 {
			n := min(len(pool), 2+rng.IntN(3))
			// Inputs from the front of the pool (a window), so the tree stays narrow.
			inputs := append([]string(nil), pool[:n]...)
			pool = pool[n:]
			// Sometimes share an input that is already in use elsewhere: a
			// loop of small width.
			if len(pool) > 0 && rng.Float64() < 0.2 {
				inputs = append(inputs, pool[0])
			}
			name := fmt.Sprintf("t%d_gate_%d", t, g)
			g++
			v := model.Variable{Name: name, States: okFailed, Parents: inputs}
			// Redundant inputs (all_of, k_of_n) make a gate rarer still; most
			// gates are any_of so that a train fails with probability about
			// the sum of its components'.
			switch r := rng.Float64(); {
			case r < 0.55:
				v.Gate = &model.Gate{Type: model.GateAnyOf}
			case r < 0.65 && len(inputs) >= 3:
				v.Gate = &model.Gate{Type: model.GateKOfN, K: 2}
			case r < 0.72:
				v.Gate = &model.Gate{Type: model.GateAllOf}
			default:
				links := map[string]float64{}
				for _, in := range inputs {
					links[in] = 0.5 + 0.49*rng.Float64()
				}
				v.NoisyOR = &model.NoisyOR{Leak: 1e-6, Links: links}
			}
			add(v)
			pool = append(pool, name)
			events = append(events, name)
		}
		train := fmt.Sprintf("train_%d", t)
		links := map[string]float64{pool[0]: 1}
		for _, c := range common {
			links[c] = 0.9 + 0.09*rng.Float64()
		}
		add(model.Variable{Name: train, States: okFailed, Parents: append([]string{pool[0]}, common...),
			NoisyOR: &model.NoisyOR{Leak: 0, Links: links}})
		ft.Trains = append(ft.Trains, train)
		events = append(events, train)
	}
	ft.Top = "top_event"
	top := model.Variable{Name: ft.Top, States: okFailed, Parents: append([]string(nil), ft.Trains...)}
	if o.Needed == o.Trains {
		top.Gate = &model.Gate{Type: model.GateAllOf}
	} else {
		top.Gate = &model.Gate{Type: model.GateKOfN, K: o.Needed}
	}
	add(top)
	events = append(events, ft.Top)
	for a := 0; a < o.Alarms; a++ {
		var watched string
		switch {
		case a < len(ft.Trains):
			watched = ft.Trains[a] // every train has an alarm
		case a == len(ft.Trains):
			watched = ft.Top
		default:
			watched = events[rng.IntN(len(events))]
		}
		fa := logU(1e-4, 1e-2)
		miss := 0.01 + 0.09*rng.Float64()
		name := fmt.Sprintf("alarm_%d_%s", a, watched)
		add(model.Variable{Name: name, States: []string{"quiet", "firing"}, Parents: []string{watched},
			Table: [][]float64{{1 - fa, fa}, {miss, 1 - miss}}})
		ft.Alarms = append(ft.Alarms, name)
		ft.Watched = append(ft.Watched, watched)
	}
	return ft
}
