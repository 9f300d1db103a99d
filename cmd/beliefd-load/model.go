package main

import (
	"encoding/json"
	"fmt"
	"math/rand/v2"

	"github.com/beliefd/beliefd/service/model"
)

// randomModel generates the scale run's model: vars variables in
// topological order, each with 2 to 4 states and up to 3 parents drawn
// from the 20 variables before it, every table row drawn uniformly from
// the simplex (normalised exponential draws), from a fixed seed.
func randomModel(vars int, seed uint64) *model.Document {
	const maxStates, maxParents, window = 4, 3, 20
	rng := rand.New(rand.NewPCG(seed, 0x5ca1e))
	doc := &model.Document{Name: fmt.Sprintf("scale-random-%d", vars)}
	cards := make([]int, vars)
	for i := range vars {
		card := 2 + rng.IntN(maxStates-1)
		cards[i] = card
		v := model.Variable{Name: fmt.Sprintf("v%d", i)}
		for s := range card {
			v.States = append(v.States, fmt.Sprintf("s%d", s))
		}
		lo := max(0, i-window)
		rows := 1
		if i > 0 {
			np := rng.IntN(maxParents + 1)
			seen := map[int]bool{}
			for len(v.Parents) < np && len(seen) < i-lo {
				p := lo + rng.IntN(i-lo)
				if !seen[p] {
					seen[p] = true
					v.Parents = append(v.Parents, fmt.Sprintf("v%d", p))
					rows *= cards[p]
				}
			}
		}
		for range rows {
			row, sum := make([]float64, card), 0.0
			for s := range row {
				row[s] = rng.ExpFloat64()
				sum += row[s]
			}
			for s := range row {
				row[s] /= sum
			}
			v.Table = append(v.Table, row)
		}
		doc.Variables = append(doc.Variables, v)
	}
	return doc
}

// scaleQuery is the scale run's job: likelihood weighting with evidence on
// the last three variables and six targets spread over the model.
func scaleQuery(doc *model.Document, samples int64, seed uint64) ([]byte, error) {
	n := len(doc.Variables)
	if n < 10 {
		return nil, fmt.Errorf("%w: --vars %d: want at least 10", errUsage, n)
	}
	ev := map[string]string{}
	for _, v := range doc.Variables[n-3:] {
		ev[v.Name] = v.States[1]
	}
	var targets []string
	for k := range 6 {
		targets = append(targets, doc.Variables[k*(n-4)/5].Name)
	}
	return json.Marshal(map[string]any{
		"model": doc.Name, "evidence": ev, "targets": targets, "method": "likelihood-weighting",
		"stop": map[string]any{"max_samples": samples}, "seed": seed,
	})
}
