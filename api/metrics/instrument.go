package metrics

import (
	"context"
	"net/http"
	"time"

	"google.golang.org/grpc"
	"google.golang.org/grpc/status"
)

// HTTP instruments h, served under the ServeMux pattern route (the route
// label: a pattern, never a raw path).
func (m *Metrics) HTTP(route string, h http.Handler) http.Handler {
	requests := m.httpRequests.MustCurryWith(map[string]string{"route": route})
	duration := m.httpDuration.WithLabelValues(route)
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		start := time.Now()
		sw := &statusWriter{ResponseWriter: w}
		defer func() {
			duration.Observe(time.Since(start).Seconds())
			c := sw.code
			if c == 0 {
				// Nothing written: a handler that panicked (the server answers
				// 500) or one that wrote nothing (200).
				c = http.StatusOK
				if rec := recover(); rec != nil {
					requests.WithLabelValues(code(http.StatusInternalServerError)).Inc()
					panic(rec)
				}
			}
			requests.WithLabelValues(code(c)).Inc()
		}()
		h.ServeHTTP(sw, r)
	})
}

// statusWriter records the status code. Unwrap lets http.ResponseController
// reach the underlying writer's Flush and deadlines.
type statusWriter struct {
	http.ResponseWriter
	code int
}

func (w *statusWriter) WriteHeader(c int) {
	if w.code == 0 && c >= 200 {
		w.code = c
	}
	w.ResponseWriter.WriteHeader(c)
}

func (w *statusWriter) Write(b []byte) (int, error) {
	if w.code == 0 {
		w.code = http.StatusOK
	}
	return w.ResponseWriter.Write(b)
}

func (w *statusWriter) Unwrap() http.ResponseWriter { return w.ResponseWriter }

// UnaryServerInterceptor counts and times unary gRPC calls.
func (m *Metrics) UnaryServerInterceptor() grpc.UnaryServerInterceptor {
	return func(ctx context.Context, req any, info *grpc.UnaryServerInfo, handler grpc.UnaryHandler) (any, error) {
		start := time.Now()
		resp, err := handler(ctx, req)
		m.observeGRPC(info.FullMethod, err, time.Since(start))
		return resp, err
	}
}

// StreamServerInterceptor counts and times streaming gRPC calls.
func (m *Metrics) StreamServerInterceptor() grpc.StreamServerInterceptor {
	return func(srv any, ss grpc.ServerStream, info *grpc.StreamServerInfo, handler grpc.StreamHandler) error {
		start := time.Now()
		err := handler(srv, ss)
		m.observeGRPC(info.FullMethod, err, time.Since(start))
		return err
	}
}

func (m *Metrics) observeGRPC(method string, err error, d time.Duration) {
	m.grpcRequests.WithLabelValues(method, status.Code(err).String()).Inc()
	m.grpcDuration.WithLabelValues(method).Observe(d.Seconds())
}
