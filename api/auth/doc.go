// Package auth authenticates the callers of beliefd's HTTP and gRPC APIs
// by bearer token, gives each call its principal (a tenant and a role),
// checks roles, and serves the admin view of the tenants.
//
// # Tokens
//
// A token is "bfd1_" followed by 43 characters of base64url: 256 random
// bits. The server keeps only the hex SHA-256 of each token, and compares
// the hash of a presented token with every known hash in constant time.
// `beliefd token` mints one and prints the token (once) and the entry to
// paste into the tenants document.
//
// # The tenants document
//
// One JSON document lists the tenants with their quotas and the hashes of
// their tokens. It is read from a file or from a Redis key, and re-read
// every few seconds; a document that cannot be read or is invalid leaves
// the one in force unchanged (and is logged).
//
//	{
//	  "tenants": {
//	    "payments": {"max_unfinished": 50, "max_samples_per_job": 100000000,
//	                 "max_model_bytes": 1048576, "share": 2},
//	    "search":   {}
//	  },
//	  "tokens": [
//	    {"label": "payments-ci", "tenant": "payments", "role": "member",
//	     "sha256": "64 hex digits"},
//	    {"label": "platform-oncall", "tenant": "search", "role": "admin",
//	     "sha256": "64 hex digits"}
//	  ]
//	}
//
// Tenant names hold letters, digits, '.', '_' and '-'. A quota of 0 (or
// absent) means no limit of the tenant's own: max_unfinished bounds its
// queued and running jobs, max_samples_per_job the samples of one job
// (stop.max_samples, and the bound of a job that gives none),
// max_model_bytes its model documents; share weighs it in fair
// scheduling (default 1). Each token belongs to a listed tenant and has
// the role "member" (the tenant's own models and jobs) or "admin" (every
// tenant's models and jobs, and the admin endpoints). The label names the
// token in logs; the token itself and its hash are never logged.
//
// # What is checked
//
// HTTP: every path under /v1/ needs "Authorization: Bearer TOKEN" (401
// with "WWW-Authenticate: Bearer" without one or with an unknown one);
// paths under /v1/admin/ need the admin role (403). Everything else
// (/healthz, /readyz, /metrics, the web page at / and its files) stays
// open. gRPC: every method needs the "authorization" metadata
// (UNAUTHENTICATED), belief.v1.AdminService needs the admin role
// (PERMISSION_DENIED); the standard health and reflection services stay
// open.
//
// Without a tenants document (New with a nil *Registry) the API is open:
// every call is the open tenant "" with the admin role, and credentials
// are not looked at.
package auth
