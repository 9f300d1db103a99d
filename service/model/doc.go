// Package model decodes, validates and compiles beliefd model documents.
//
// A model document is JSON:
//
//	{
//	  "name": "checkout-platform",
//	  "description": "optional free text",
//	  "variables": [
//	    {"name": "grid_power", "states": ["ok", "lost"],
//	     "failure_rate": {"lambda": 2e-5, "mission_time": 720}},
//	    {"name": "ups", "states": ["ok", "failed"], "table": [[0.999, 0.001]]},
//	    {"name": "rack_power", "states": ["ok", "lost"], "parents": ["grid_power", "ups"],
//	     "gate": {"type": "all_of"}},
//	    {"name": "power_alarm", "states": ["quiet", "firing"], "parents": ["rack_power"],
//	     "table": [[0.995, 0.005], [0.02, 0.98]]}
//	  ]
//	}
//
// Every variable has a name, an ordered list of states, an optional list of
// parents, and exactly one distribution:
//
//   - "table": one row per parent configuration, in row-major order over
//     "parents" as listed with the LAST parent varying fastest; each row lists
//     the probabilities of "states" in order and sums to 1 (within 1e-6).
//   - "rows": the same table written as [{"given": {"parent": "state"}, "p": [...]}],
//     one entry for every parent configuration, in any order.
//   - "noisy_or": {"leak": L, "links": {"parent": c}}. The child has two
//     states. A parent is active when it is in one of its fault states. Each
//     link c is the probability that the parent, active and alone, produces
//     the child's fault state in the absence of the leak; the leak L is the
//     probability of the fault state when no parent is active. So
//     P(fault | active set A) = 1 - (1-L) * prod_{i in A} (1-c_i)
//     (the leak parameterisation of Díez 1993; Pearl 1988 has the leak-free form).
//   - "noisy_max": {"leak": [...], "links": {"parent": {"parent_state": [...]}}}.
//     The child's states are ordered by severity, first = normal. The leak and
//     each link are distributions over the child's states: the level a cause
//     would produce on its own. Links are given for each non-normal parent
//     state (the first state of a parent never causes anything). The child
//     takes the most severe level produced: P(Y <= y | x) = L(<=y) * prod_i C_i(<=y | x_i)
//     (Díez 1993; Henrion 1989 for the binary case).
//   - "gate": {"type": "any_of" | "all_of" | "k_of_n", "k": K}. Deterministic
//     fault-tree logic over the parents' fault states: the child (two states)
//     is in its fault state exactly when any / all / at least K of its parents
//     are in a fault state.
//   - "failure_rate": {"lambda": λ, "mission_time": t}. A root event with two
//     states, failed with probability 1 - exp(-λ t) (λ and t in the same time unit).
//
// Fault states. Compact forms need to know which states count as "failed" or
// "active". A variable may list them in "fault_states"; by default every
// state except the first is a fault state, so states are written from normal
// to worst ("ok", "degraded", "down"). A two-state child of a noisy-OR, gate
// or failure-rate distribution must have exactly one fault state.
//
// Compilation expands every distribution into a flat conditional probability
// table, orders the variables topologically (keeping document order where the
// document already is topological), and computes a content hash of the
// canonical form: variable names, states, parents and table values, so two
// documents that describe the same model get the same hash whatever their
// name, description or distribution notation.
package model
