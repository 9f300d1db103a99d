// Package apitest holds model documents for the transport tests.
package apitest

// ChestClinic is the chest-clinic network of Lauritzen & Spiegelhalter
// (1988), "Local computations with probabilities on graphical structures
// and their application to expert systems", JRSS-B 50(2):157-224, as a
// model document. Published marginals without evidence (the paper's
// tables): tub 0.0104, lung 0.055, bronc 0.45, either 0.064828,
// xray 0.110290, dysp 0.435971.
const ChestClinic = `{
  "name": "chest-clinic",
  "variables": [
    {"name": "asia", "states": ["no", "yes"], "table": [[0.99, 0.01]]},
    {"name": "smoke", "states": ["no", "yes"], "table": [[0.5, 0.5]]},
    {"name": "tub", "states": ["no", "yes"], "parents": ["asia"], "table": [[0.99, 0.01], [0.95, 0.05]]},
    {"name": "lung", "states": ["no", "yes"], "parents": ["smoke"], "table": [[0.99, 0.01], [0.9, 0.1]]},
    {"name": "bronc", "states": ["no", "yes"], "parents": ["smoke"], "table": [[0.7, 0.3], [0.4, 0.6]]},
    {"name": "either", "states": ["no", "yes"], "parents": ["tub", "lung"], "gate": {"type": "any_of"}},
    {"name": "xray", "states": ["no", "yes"], "parents": ["either"], "table": [[0.95, 0.05], [0.02, 0.98]]},
    {"name": "dysp", "states": ["no", "yes"], "parents": ["either", "bronc"],
     "table": [[0.9, 0.1], [0.2, 0.8], [0.3, 0.7], [0.1, 0.9]]}
  ]
}`

// Published marginals P(var = yes) of the chest-clinic network without
// evidence (Lauritzen & Spiegelhalter 1988).
var ChestClinicYes = map[string]float64{
	"tub": 0.0104, "lung": 0.055, "bronc": 0.45, "either": 0.064828, "xray": 0.110290, "dysp": 0.435971,
}

// BadRows is a model whose "ups" table has the wrong number of rows and
// whose "alarm" row does not sum to 1: two problems, two variables.
const BadRows = `{
  "name": "bad",
  "variables": [
    {"name": "power", "states": ["ok", "lost"], "table": [[0.9, 0.1]]},
    {"name": "ups", "states": ["ok", "failed"], "parents": ["power"], "table": [[0.99, 0.01]]},
    {"name": "alarm", "states": ["quiet", "firing"], "parents": ["power"], "table": [[0.9, 0.2], [0.1, 0.9]]}
  ]
}`
