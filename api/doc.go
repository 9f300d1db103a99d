// Package api holds beliefd's transports: the gRPC server (api/grpcapi),
// HTTP/JSON with Server-Sent Events (api/httpapi), Prometheus metrics
// (api/metrics), the conversion between the JSON documents and the protobuf
// messages (api/convert), the one mapping from service errors to HTTP
// statuses and gRPC codes (api/errmap) and bearer-token authentication with
// tenants and roles (api/auth). Both servers call the domain through the
// Service interface declared here, which *jobs.Service implements.
//
// # Tenants and tokens
//
// With a tenants document (api/auth), every path under /v1/ needs
// "Authorization: Bearer TOKEN" and every gRPC call the "authorization"
// metadata; /healthz, /readyz, /metrics, the web page and gRPC health and
// reflection stay open. A token belongs to a tenant, as a member or an
// admin. A member sees and acts on its tenant's models and jobs only: those
// of other tenants answer 404 / NOT_FOUND exactly as objects that do not
// exist. Model names are per tenant. An admin sees every tenant's jobs and
// models; in its lists and references another tenant's model is named
// "TENANT/NAME" and the open tenant's "/NAME". Without a tenants document
// every caller is the open tenant "" with the admin role. With
// --metrics-need-token, /metrics needs a token with the metrics role (which
// may call nothing else) or the admin role, since the standing-query gauges
// carry every tenant's posteriors.
//
// # HTTP API
//
// Request and response bodies are the JSON documents of beliefd as they
// are (service/model/doc.go for the model document, service/infer/doc.go
// for the query and result documents), never a protobuf rendering of them.
// Unknown fields in a request body are rejected. Bodies larger than the
// configured limit (64 MiB for models, 1 MiB for queries by default) get
// 413.
//
//	POST   /v1/models               body: model document
//	    201 the new version's info, Location: /v1/models/NAME@VERSION
//	    200 the latest version already had the same content hash: its info
//	    info: {"name", "version", "hash", "variables", "bytes", "created_at"}
//	GET    /v1/models               ?page_size=N&page_token=T
//	    200 {"models": [info...], "next_page_token": "" after the last page}
//	GET    /v1/models/{name}        name is NAME or NAME@VERSION; or ?version=N
//	    200 the model document exactly as stored; metadata in headers:
//	        ETag: "HASH", Beliefd-Model-Name, Beliefd-Model-Version,
//	        Beliefd-Model-Hash, Last-Modified
//	DELETE /v1/models/{name}        every version (NAME@VERSION is refused)
//	    204
//	POST   /v1/jobs                 body: query document; idempotency key in the
//	                                Idempotency-Key header or "idempotency_key"
//	    202 job view of the new job, Location: /v1/jobs/{id}
//	    200 job view of the job an earlier submission with the same key made
//	GET    /v1/jobs                 ?page_size=N&page_token=T, newest first
//	    200 {"jobs": [job metadata...], "next_page_token": ""}
//	GET    /v1/jobs/{id}
//	    200 job view (the result is partial while the job runs)
//	GET    /v1/jobs/{id}/events     Server-Sent Events, see below
//	POST   /v1/jobs/{id}/cancel
//	    200 job view; a finished job is returned unchanged
//	POST   /v1/query                body: query document; ?timeout=DURATION
//	                                (default 30s, at most 10m)
//	    200 result document, computed synchronously by the serving process
//	GET    /v1/admin/tenants        admin role only
//	    200 {"tenants": [{"tenant", "queued", "running", "quotas": {"max_unfinished",
//	        "max_samples_per_job", "max_model_bytes", "share"}}...]}: every configured
//	        tenant and every other tenant with unfinished jobs, in tenant order
//	POST   /v1/standing-queries     body: standing query spec (below); ?wait=DURATION
//	                                (at most 1m) waits for the first result
//	    201 standing query view, Location: /v1/standing-queries/{id}
//	GET    /v1/standing-queries
//	    200 {"standing_queries": [standing query view...]}, oldest first
//	GET    /v1/standing-queries/{id}
//	    200 standing query view
//	DELETE /v1/standing-queries/{id}
//	    204 (its gauges leave /metrics)
//	PATCH  /v1/standing-queries/{id}/evidence   (POST too) body: evidence update
//	                                (below); ?wait=DURATION waits for the new result
//	    200 standing query view
//	GET    /metrics                 Prometheus exposition format (api/metrics)
//	GET    /healthz                 liveness: 200 {"status": "ok"} while the process serves
//	GET    /readyz                  readiness: 200 {"status": "ready"}, or 503
//	                                when the job store cannot be reached
//
// A job view is the job's result document with its fields at the top
// level, unchanged ("state" is the job's state: queued, running,
// succeeded, failed or cancelled), plus "id" and a "job" object with the
// job's metadata: id, state, priority, model (the resolved version's
// info), query (as submitted), method, seed, blocks, merged_blocks,
// result_at, error (why it failed), idempotency_key, created_at,
// started_at, updated_at, finished_at, deadline. A program that reads
// result documents reads job views as they are. Before the first partial
// result a job view has the job's method and seed, 0 samples and empty
// marginals. GET /v1/jobs lists the "job" objects alone.
//
// Event stream. GET /v1/jobs/{id}/events answers text/event-stream. Each
// event's data is a job view on one line:
//
//	event: update      the job now, then after each change while it is unfinished
//	event: final       the terminal state; the response ends after it
//	event: error       the stream ended early (data: the error body); reconnect
//	: heartbeat        a comment every 15 s, so proxies keep idle streams open
//
// A client that reads slowly gets the latest state, not a backlog of the
// states it missed. A job already finished gives one final event.
//
// Errors. Every error has one shape:
//
//	{"error": {"status": 400, "code": "INVALID_ARGUMENT", "reason": "INVALID_MODEL",
//	           "message": "put model \"m\": invalid model: ...",
//	           "field_violations": [{"field": "variables[fan].table", "description": "..."}]}}
//
// "status" repeats the HTTP status; "code" is the gRPC code name the gRPC
// API gives for the same error; "reason" is a finer, stable name to branch
// on; "field_violations" names the request fields at fault (empty when no
// single field is). Client errors carry a message naming what is wrong;
// server errors carry a short fixed text (details go to the server log).
//
//	400 INVALID_ARGUMENT    malformed or invalid model or query (unknown variable
//	                        or state, bad stop rule, zero-probability evidence,
//	                        exact inference too costly, ...), bad parameter
//	401 UNAUTHENTICATED     no bearer token, or one the server does not know
//	                        (with WWW-Authenticate: Bearer)
//	403 PERMISSION_DENIED   the token's role does not allow the call (admin endpoints)
//	404 NOT_FOUND           no such model, model version, job or endpoint (or one
//	                        of another tenant)
//	405 UNIMPLEMENTED       method not allowed on the path (Allow header lists the allowed ones)
//	409 ABORTED             a concurrent update won; try again
//	413 INVALID_ARGUMENT    request body over the limit (reason BODY_TOO_LARGE)
//	429 RESOURCE_EXHAUSTED  the job queue is full (reason QUEUE_FULL), or a quota of
//	                        the tenant is used up (reason QUOTA_EXCEEDED; the
//	                        message names the quota and its value)
//	499 CANCELLED           the client went away
//	500 INTERNAL            anything else
//	503 UNAVAILABLE         the job store cannot be reached (also /readyz)
//	504 DEADLINE_EXCEEDED   the deadline passed (POST /v1/query)
//
// # Standing queries
//
// A standing query (service/standing) is a question a monitoring system
// registers once; beliefd answers it again whenever its evidence changes
// and on its interval, and exports the latest posteriors as gauges
// (beliefd_standing_posterior with _lower and _upper, labelled tenant,
// standing_query, variable and state; api/metrics/standing.go lists them
// all). The spec is a query document without mpe, soft evidence, priority
// and idempotency key, plus an id (alert rules name it) and an interval:
//
//	{"id": "checkout-root-cause", "model": "tarnwick-platform",
//	 "targets": ["bad_deploy", "orders_db"], "evidence": {"alarm_checkout_5xx": "firing"},
//	 "method": "auto", "stop": {...}, "seed": 7, "interval": "1m"}
//
// Targets are required (at most 32, with at most 256 states among them),
// the stop timeout may not exceed the recompute limit (30s), the interval
// is 1s to 24h (default 1m). An evidence update sets or changes items,
// clears items, or replaces them all, optionally only at an expected
// revision:
//
//	{"set": {"alarm_canary": "firing"}, "clear": ["alarm_db_replication_lag"],
//	 "replace": false, "expect_revision": 3}
//
// Each change raises the evidence revision by one (an update that changes
// nothing keeps it). A standing query view is:
//
//	{"id", "tenant" (absent for the open tenant), "model", "targets", "method",
//	 "stop", "seed", "interval", "evidence", "revision", "evidence_updated_at",
//	 "created_at", "updated_at",
//	 "status": "pending" | "current" | "updating" | "failed",
//	 "result": result document (null before the first), "result_revision",
//	 "result_evidence", "result_at", "result_age_seconds",
//	 "error", "error_revision", "error_at"}
//
// "result" is the result document of the evidence "result_evidence" at
// "result_revision"; "status" is current when that is the evidence now.
// Unknown variables or states, evidence of probability zero (checked by
// exact inference where the model allows it) and a bad spec get 400 naming
// the problem; an id the tenant already uses 409 ALREADY_EXISTS; a wrong
// expect_revision 409 REVISION_MISMATCH; more standing queries than the
// server allows (--max-standing-queries, all tenants together) 429
// STANDING_QUERY_LIMIT. Standing queries are per tenant like models; an
// admin lists every tenant's and names another tenant's with ?tenant=NAME.
//
// # gRPC API
//
// proto/belief/v1 defines ModelService, JobService (WatchJob streams the
// latest state to slow readers), QueryService, StandingQueryService
// (standing.proto: the calls above) and AdminService
// (ListTenantUsage, admin role only), with the standard
// grpc.health.v1 service (SERVING while the service is ready) and server
// reflection. Errors carry the same codes, a google.rpc.ErrorInfo with the
// reason (domain "beliefd") and google.rpc.BadRequest field violations
// whose fields are paths in the request ("model.variables[fan].table",
// "query.stop").
package api
