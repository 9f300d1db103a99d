// Package infer answers queries against compiled models: it resolves a query
// document, picks a method (exact inference, or one of the samplers), runs
// it, and shapes the result document that every interface of beliefd
// returns (the command line with --json, HTTP and gRPC).
//
// Query document (JSON, snake_case):
//
//	{"model": "NAME" or "NAME@VERSION",
//	 "evidence": {"var": "state"},
//	 "soft_evidence": {"var": [likelihood per state]},
//	 "targets": ["var"],            // default: every variable without hard evidence
//	 "method": "auto" | "exact" | "forward" | "rejection" | "likelihood-weighting" | "gibbs" | "adaptive-importance",
//	 "adaptive": {"rare_targets": ["var"], "rare_threshold": 0.001, "eps_delta": {"epsilon": 0.1, "delta": 0.05}},
//	 "mpe": false,                  // also compute the most probable explanation
//	 "stop": {"max_samples": 1000000, "timeout": "30s", "abs_err": 0.01,
//	          "rel_err": 0.1, "confidence": 0.95},
//	 "seed": 42}                    // default: drawn at random and reported
//
// Result document:
//
//	{"method": "likelihood-weighting", "method_reason": "...", "seed": 42,
//	 "samples": 1000000, "effective_samples": 812345.6, "stop_reason": "max_samples",
//	 "elapsed_seconds": 0.41, "confidence": 0.95,
//	 "evidence_probability": {"p": 0.0045, "lo": 0.0044, "hi": 0.0046, "log10": -2.35},
//	 "marginals": {"var": {"state": {"p": 0.08, "lo": 0.079, "hi": 0.081}}},
//	 "mpe": {"assignment": {"var": "state"}, "p": 0.41, "joint": 0.0018, "log10_joint": -2.74},
//	 "diagnostics": {...}, "warnings": [...], "caution": "..."}
//
// Exact answers use the same shape with lo = hi = p. In "mpe", "p" is the
// probability of the assignment given the evidence and "joint" is
// P(assignment, evidence). "evidence_probability" is absent when a method
// does not estimate it (Gibbs sampling).
package infer
