// Package httpapi serves beliefd's HTTP/JSON API: models, jobs (with
// Server-Sent Events for partial results), synchronous queries, metrics,
// liveness and readiness. Bodies are the JSON documents of service/model
// and service/infer, unchanged; package api's documentation lists the
// endpoints, statuses and the error shape.
//
// Handlers are thin: they read and check the request, call the Service,
// and map its error once (api/errmap).
package httpapi

import (
	"encoding/json"
	"fmt"
	"log/slog"
	"net/http"
	"runtime/debug"
	"strings"
	"time"

	"github.com/beliefd/beliefd/api"
	"github.com/beliefd/beliefd/api/errmap"
	"github.com/beliefd/beliefd/api/metrics"
	"github.com/beliefd/beliefd/api/web"
	"github.com/beliefd/beliefd/service/model"
	"google.golang.org/grpc/codes"
)

// Service is what the HTTP API needs from the domain; *jobs.Service
// implements it.
type Service = api.Service

// Defaults of Options.
const (
	DefaultMaxModelBytes   = model.DefaultMaxDocumentBytes
	DefaultMaxQueryBytes   = 1 << 20
	DefaultQueryTimeout    = 30 * time.Second
	DefaultMaxQueryTimeout = 10 * time.Minute
	DefaultHeartbeat       = 15 * time.Second
	DefaultReadyTimeout    = 2 * time.Second
)

// Options configure the HTTP API. Zero values take the defaults.
type Options struct {
	// Logger receives request lines (debug level) and server-side failures;
	// default slog.Default(). No bodies, model content or credentials are logged.
	Logger *slog.Logger
	// Metrics, when set, instruments every route (labelled by pattern).
	Metrics *metrics.Metrics
	// MetricsHandler, when set, is served at GET /metrics (see metrics.Handler).
	MetricsHandler http.Handler
	// MaxModelBytes bounds a model document body; default DefaultMaxModelBytes.
	MaxModelBytes int64
	// MaxQueryBytes bounds a query document body; default DefaultMaxQueryBytes.
	MaxQueryBytes int64
	// QueryTimeout is the deadline of POST /v1/query without ?timeout=;
	// default DefaultQueryTimeout.
	QueryTimeout time.Duration
	// MaxQueryTimeout is the largest ?timeout= accepted; default DefaultMaxQueryTimeout.
	MaxQueryTimeout time.Duration
	// Heartbeat is the interval of comment lines on event streams, which
	// keep proxies from closing idle connections; default DefaultHeartbeat.
	Heartbeat time.Duration
	// ReadyTimeout bounds the readiness check; default DefaultReadyTimeout.
	ReadyTimeout time.Duration
	// Auth, when set, wraps every route inside the metrics and panic
	// recovery (api/auth's Authenticator.HTTP): it authenticates and
	// attaches the caller's principal, or answers 401 or 403.
	Auth func(http.Handler) http.Handler
	// Admin, when set, serves GET /v1/admin/tenants (api/auth's Admin).
	Admin http.Handler
	// Standing, when set, serves /v1/standing-queries (standing.go).
	Standing api.StandingService
}

func (o Options) withDefaults() Options {
	if o.Logger == nil {
		o.Logger = slog.Default()
	}
	if o.MaxModelBytes <= 0 {
		o.MaxModelBytes = DefaultMaxModelBytes
	}
	if o.MaxQueryBytes <= 0 {
		o.MaxQueryBytes = DefaultMaxQueryBytes
	}
	if o.QueryTimeout <= 0 {
		o.QueryTimeout = DefaultQueryTimeout
	}
	if o.MaxQueryTimeout <= 0 {
		o.MaxQueryTimeout = DefaultMaxQueryTimeout
	}
	if o.QueryTimeout > o.MaxQueryTimeout {
		o.QueryTimeout = o.MaxQueryTimeout
	}
	if o.Heartbeat <= 0 {
		o.Heartbeat = DefaultHeartbeat
	}
	if o.ReadyTimeout <= 0 {
		o.ReadyTimeout = DefaultReadyTimeout
	}
	return o
}

type handler struct {
	svc  Service
	opts Options
	log  *slog.Logger
}

// route is a method's handler on a path.
type route struct {
	method string
	fn     http.HandlerFunc
}

// routePath is a path with the handlers of its methods.
type routePath struct {
	path   string
	routes []route
}

// register puts each route on mux through wrap, with HEAD beside GET, and
// answers every other method on a known path with 405 in the error shape.
func (h *handler) register(mux *http.ServeMux, paths []routePath) {
	for _, p := range paths {
		var allowed []string
		for _, r := range p.routes {
			pattern := r.method + " " + p.path
			mux.Handle(pattern, h.wrap(pattern, r.fn))
			allowed = append(allowed, r.method)
			if r.method == "GET" {
				allowed = append(allowed, "HEAD")
			}
		}
		mux.Handle(p.path, h.wrap(p.path, h.methodNotAllowed(strings.Join(allowed, ", "))))
	}
}

// New returns the HTTP handler of the API over svc.
func New(svc Service, opts Options) http.Handler {
	opts = opts.withDefaults()
	h := &handler{svc: svc, opts: opts, log: opts.Logger}
	mux := http.NewServeMux()
	paths := []routePath{
		{"/v1/models", []route{{"POST", h.createModel}, {"GET", h.listModels}}},
		{"/v1/models/{name}", []route{{"GET", h.getModel}, {"DELETE", h.deleteModel}}},
		{"/v1/jobs", []route{{"POST", h.submitJob}, {"GET", h.listJobs}}},
		{"/v1/jobs/{id}", []route{{"GET", h.getJob}}},
		{"/v1/jobs/{id}/events", []route{{"GET", h.jobEvents}}},
		{"/v1/jobs/{id}/cancel", []route{{"POST", h.cancelJob}}},
		{"/v1/query", []route{{"POST", h.query}}},
		{"/healthz", []route{{"GET", h.healthz}}},
		{"/readyz", []route{{"GET", h.readyz}}},
	}
	if opts.Admin != nil {
		paths = append(paths, routePath{"/v1/admin/tenants", []route{{"GET", opts.Admin.ServeHTTP}}})
	}
	if opts.MetricsHandler != nil {
		paths = append(paths, routePath{"/metrics", []route{{"GET", opts.MetricsHandler.ServeHTTP}}})
	}
	h.register(mux, paths)
	// The web page at / and its files under web.Prefix (api/web).
	page := web.Handler(http.HandlerFunc(h.notFound))
	mux.Handle("GET /{$}", h.wrap("GET /", page.ServeHTTP))
	mux.Handle("GET "+web.Prefix, h.wrap("GET "+web.Prefix, page.ServeHTTP))
	if opts.Standing != nil {
		h.routeStanding(mux, opts.Standing)
	}
	mux.Handle("/", h.wrap("unmatched", h.notFound))
	return mux
}

// wrap adds panic recovery, a debug request line and, when configured,
// authentication and metrics labelled with the route pattern.
func (h *handler) wrap(route string, fn http.HandlerFunc) http.Handler {
	var inner http.Handler = fn
	if h.opts.Auth != nil {
		inner = h.opts.Auth(inner)
	}
	var next http.Handler = http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		start := time.Now()
		rw := &recorder{ResponseWriter: w}
		defer func() {
			if p := recover(); p != nil {
				if p == http.ErrAbortHandler {
					panic(p)
				}
				h.log.Error("http: panic", "route", route, "panic", fmt.Sprint(p), "stack", string(debug.Stack()))
				if rw.status != 0 {
					// Part of a response went out: abort the connection so the
					// client does not take it for a whole one.
					panic(http.ErrAbortHandler)
				}
				h.writeError(rw, errmap.Error{HTTPStatus: http.StatusInternalServerError, Code: codes.Internal, Reason: "INTERNAL", Message: "internal error"})
			}
			h.log.Debug("http: request", "method", r.Method, "route", route, "status", rw.status, "seconds", time.Since(start).Seconds())
		}()
		inner.ServeHTTP(rw, r)
	})
	if h.opts.Metrics != nil {
		next = h.opts.Metrics.HTTP(route, next)
	}
	return next
}

// recorder remembers the status written. Unwrap lets
// http.ResponseController reach Flush and the write deadline.
type recorder struct {
	http.ResponseWriter
	status int
}

func (w *recorder) WriteHeader(code int) {
	if w.status == 0 {
		w.status = code
	}
	w.ResponseWriter.WriteHeader(code)
}

func (w *recorder) Write(b []byte) (int, error) {
	if w.status == 0 {
		w.status = http.StatusOK
	}
	return w.ResponseWriter.Write(b)
}

func (w *recorder) Unwrap() http.ResponseWriter { return w.ResponseWriter }

// errorBody is the one error shape of the API.
type errorBody struct {
	Error errorDetail `json:"error"`
}

type errorDetail struct {
	Status          int                     `json:"status"`
	Code            string                  `json:"code"`
	Reason          string                  `json:"reason"`
	Message         string                  `json:"message"`
	FieldViolations []errmap.FieldViolation `json:"field_violations"`
}

// fail maps err and writes it; server-side failures are logged.
func (h *handler) fail(w http.ResponseWriter, r *http.Request, err error) {
	e := errmap.Map(err)
	if e.Server {
		h.log.Error("http: request failed", "method", r.Method, "route", r.Pattern, "status", e.HTTPStatus, "err", err)
	}
	h.writeError(w, e)
}

func (h *handler) writeError(w http.ResponseWriter, e errmap.Error) {
	v := e.Violations
	if v == nil {
		v = []errmap.FieldViolation{}
	}
	h.writeJSON(w, e.HTTPStatus, errorBody{Error: errorDetail{
		Status: e.HTTPStatus, Code: errmap.CodeName(e.Code), Reason: e.Reason, Message: e.Message, FieldViolations: v,
	}})
}

func (h *handler) writeJSON(w http.ResponseWriter, status int, v any) {
	body, err := json.Marshal(v)
	if err != nil {
		h.log.Error("http: encode response", "err", err)
		status = http.StatusInternalServerError
		body = []byte(`{"error":{"status":500,"code":"INTERNAL","reason":"INTERNAL","message":"internal error","field_violations":[]}}`)
	}
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("X-Content-Type-Options", "nosniff")
	w.WriteHeader(status)
	_, _ = w.Write(append(body, '\n'))
}

func (h *handler) methodNotAllowed(allow string) http.HandlerFunc {
	return func(w http.ResponseWriter, r *http.Request) {
		w.Header().Set("Allow", allow)
		h.writeError(w, errmap.Error{HTTPStatus: http.StatusMethodNotAllowed, Code: codes.Unimplemented, Reason: "METHOD_NOT_ALLOWED",
			Message: fmt.Sprintf("method %s is not allowed here (allowed: %s)", r.Method, allow)})
	}
}

func (h *handler) notFound(w http.ResponseWriter, r *http.Request) {
	h.writeError(w, errmap.Error{HTTPStatus: http.StatusNotFound, Code: codes.NotFound, Reason: "NOT_FOUND",
		Message: "no such endpoint (see the API documentation for the endpoints under /v1/)"})
}
