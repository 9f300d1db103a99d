// Package testnets builds model documents for tests and benchmarks: published
// reference networks (with their citation) and random networks generated from
// a seed. It is internal: nothing here is a product feature.
package testnets

import (
	"fmt"
	"math/rand/v2"

	"github.com/beliefd/beliefd/service/model"
)

// MustCompile compiles a document with default limits or panics.
func MustCompile(doc *model.Document) *model.Network {
	net, err := model.Compile(doc, model.Limits{})
	if err != nil {
		panic(err)
	}
	return net
}

// ChestClinic is the chest-clinic network of Lauritzen & Spiegelhalter (1988),
// "Local computations with probabilities on graphical structures and their
// application to expert systems", JRSS-B 50(2):157-224. States are
// ["no", "yes"]. Published values (from the paper's tables):
// marginals tub 0.0104, lung 0.055, bronc 0.45, either 0.064828,
// xray 0.110290, dysp 0.435971.
func ChestClinic() *model.Document {
	yn := []string{"no", "yes"}
	row := func(pYes float64) []float64 { return []float64{1 - pYes, pYes} }
	v := func(name string, parents []string, rows ...[]float64) model.Variable {
		return model.Variable{Name: name, States: yn, Parents: parents, Table: rows}
	}
	// Rows: parent configurations with the last parent fastest; parent
	// states are ordered no, yes, so a single parent gives rows (no, yes).
	return &model.Document{
		Name: "chest-clinic",
		Variables: []model.Variable{
			v("asia", nil, row(0.01)),
			v("smoke", nil, row(0.5)),
			v("tub", []string{"asia"}, row(0.01), row(0.05)),
			v("lung", []string{"smoke"}, row(0.01), row(0.10)),
			v("bronc", []string{"smoke"}, row(0.30), row(0.60)),
			{Name: "either", States: yn, Parents: []string{"tub", "lung"}, Gate: &model.Gate{Type: model.GateAnyOf}},
			v("xray", []string{"either"}, row(0.05), row(0.98)),
			// dysp | either, bronc: FF 0.1, FT 0.8, TF 0.7, TT 0.9
			v("dysp", []string{"either", "bronc"}, row(0.1), row(0.8), row(0.7), row(0.9)),
		},
	}
}

// RandomOptions shapes Random.
type RandomOptions struct {
	Vars       int     // number of variables
	MaxParents int     // parents per variable, chosen among earlier variables
	MaxStates  int     // states per variable, 2..MaxStates
	ZeroProb   float64 // chance that a table entry is an exact zero (rows keep one positive entry)
	Window     int     // parents are drawn from the previous Window variables (0 = all)
	// Leaves makes the last Leaves of the Vars variables childless effects:
	// each takes 1..MaxParents parents drawn from all the earlier variables
	// that are not among these last ones (Window does not apply), and none
	// of them is a parent of another. 0 leaves the network as above.
	Leaves int
}

// Random generates a random network: variables in topological order, each
// with up to MaxParents parents drawn from earlier variables and rows drawn
// uniformly from the simplex (with optional exact zeros).
func Random(rng *rand.Rand, o RandomOptions) *model.Document {
	if o.MaxStates < 2 {
		o.MaxStates = 2
	}
	doc := &model.Document{Name: fmt.Sprintf("random-%d", o.Vars)}
	cards := make([]int, o.Vars)
	for i := 0; i < o.Vars; i++ {
		card := 2 + rng.IntN(o.MaxStates-1)
		cards[i] = card
		states := make([]string, card)
		for k := range states {
			states[k] = fmt.Sprintf("s%d", k)
		}
		var parents []string
		lo, hi := 0, i
		if o.Window > 0 && i > o.Window {
			lo = i - o.Window
		}
		np := 0
		if i > 0 && o.MaxParents > 0 {
			np = rng.IntN(o.MaxParents + 1)
		}
		if first := o.Vars - o.Leaves; o.Leaves > 0 && i >= first && first > 0 && o.MaxParents > 0 {
			lo, hi = 0, first
			np = 1 + rng.IntN(o.MaxParents)
		}
		if np > 0 {
			seen := map[int]bool{}
			for len(parents) < np && len(seen) < hi-lo {
				p := lo + rng.IntN(hi-lo)
				if !seen[p] {
					seen[p] = true
					parents = append(parents, fmt.Sprintf("v%d", p))
				}
			}
		}
		rows := 1
		for _, p := range parents {
			var idx int
			fmt.Sscanf(p, "v%d", &idx)
			rows *= cards[idx]
		}
		table := make([][]float64, rows)
		for r := range table {
			table[r] = randomRow(rng, card, o.ZeroProb)
		}
		doc.Variables = append(doc.Variables, model.Variable{Name: fmt.Sprintf("v%d", i), States: states, Parents: parents, Table: table})
	}
	return doc
}

func randomRow(rng *rand.Rand, card int, zeroProb float64) []float64 {
	row := make([]float64, card)
	sum := 0.0
	keep := rng.IntN(card)
	for k := range row {
		if k != keep && rng.Float64() < zeroProb {
			continue
		}
		row[k] = rng.ExpFloat64() // uniform on the simplex after normalising
		sum += row[k]
	}
	for k := range row {
		row[k] /= sum
	}
	return row
}
