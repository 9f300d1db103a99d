// Package grpcapi serves beliefd's gRPC API (proto/belief/v1): the
// ModelService, JobService and QueryService over the Service interface of
// package api, plus the standard health service (serving while the
// service is ready) and server reflection.
//
// Wiring:
//
//	gs := grpc.NewServer(grpcapi.ServerOptions(opts)...)
//	srv := grpcapi.Register(gs, svc, opts)
//	go srv.RunHealth(ctx) // keeps the health status in step with svc.Ready
//	gs.Serve(lis)
//
// Errors are mapped once, by api/errmap: status codes with ErrorInfo and
// BadRequest field violations (fields as paths in the request message, such
// as "model.variables[fan].table" or "query.stop").
package grpcapi

import (
	"context"
	"fmt"
	"log/slog"
	"runtime/debug"
	"time"

	"github.com/beliefd/beliefd/api"
	"github.com/beliefd/beliefd/api/errmap"
	"github.com/beliefd/beliefd/api/metrics"
	beliefv1 "github.com/beliefd/beliefd/proto/belief/v1"
	"github.com/beliefd/beliefd/service/model"
	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/health"
	healthpb "google.golang.org/grpc/health/grpc_health_v1"
	"google.golang.org/grpc/reflection"
	"google.golang.org/grpc/status"
)

// Service is what the gRPC server needs from the domain; *jobs.Service
// implements it.
type Service = api.Service

// Defaults of Options.
const (
	DefaultQueryTimeout   = 30 * time.Second
	DefaultHealthInterval = 5 * time.Second
	// DefaultMaxMessageBytes admits a model document of the service's
	// default size limit with room for the message framing.
	DefaultMaxMessageBytes = model.DefaultMaxDocumentBytes + 1<<20
)

// Options configure the gRPC server. Zero values take the defaults.
type Options struct {
	// Logger receives server-side failures; default slog.Default(). No
	// model content or request data is logged.
	Logger *slog.Logger
	// Metrics, when set, counts and times every call.
	Metrics *metrics.Metrics
	// QueryTimeout bounds QueryService.Query when the call has no deadline;
	// default DefaultQueryTimeout.
	QueryTimeout time.Duration
	// HealthInterval is how often RunHealth asks Service.Ready; default
	// DefaultHealthInterval.
	HealthInterval time.Duration
	// MaxMessageBytes bounds received messages; default DefaultMaxMessageBytes.
	MaxMessageBytes int
	// Auth, when set, authenticates every call after metrics and panic
	// recovery (api/auth's Authenticator): it attaches the caller's
	// principal or answers UNAUTHENTICATED or PERMISSION_DENIED.
	Auth Authenticator
	// Admin, when set, is registered as belief.v1.AdminService (api/auth's Admin).
	Admin beliefv1.AdminServiceServer
}

// Authenticator supplies the interceptors that authenticate calls.
type Authenticator interface {
	UnaryInterceptor() grpc.UnaryServerInterceptor
	StreamInterceptor() grpc.StreamServerInterceptor
}

func (o Options) withDefaults() Options {
	if o.Logger == nil {
		o.Logger = slog.Default()
	}
	if o.QueryTimeout <= 0 {
		o.QueryTimeout = DefaultQueryTimeout
	}
	if o.HealthInterval <= 0 {
		o.HealthInterval = DefaultHealthInterval
	}
	if o.MaxMessageBytes <= 0 {
		o.MaxMessageBytes = DefaultMaxMessageBytes
	}
	return o
}

// ServerOptions returns the options for grpc.NewServer: panic recovery,
// metrics (when opts.Metrics is set), authentication (when opts.Auth is
// set) and the message size limit.
func ServerOptions(opts Options) []grpc.ServerOption {
	opts = opts.withDefaults()
	unary := []grpc.UnaryServerInterceptor{}
	stream := []grpc.StreamServerInterceptor{}
	if opts.Metrics != nil {
		unary = append(unary, opts.Metrics.UnaryServerInterceptor())
		stream = append(stream, opts.Metrics.StreamServerInterceptor())
	}
	unary = append(unary, recoverUnary(opts.Logger))
	stream = append(stream, recoverStream(opts.Logger))
	if opts.Auth != nil {
		unary = append(unary, opts.Auth.UnaryInterceptor())
		stream = append(stream, opts.Auth.StreamInterceptor())
	}
	return []grpc.ServerOption{
		grpc.ChainUnaryInterceptor(unary...),
		grpc.ChainStreamInterceptor(stream...),
		grpc.MaxRecvMsgSize(opts.MaxMessageBytes),
	}
}

// Server implements the gRPC services of beliefd.
type Server struct {
	beliefv1.UnimplementedModelServiceServer
	beliefv1.UnimplementedJobServiceServer
	beliefv1.UnimplementedQueryServiceServer

	svc    Service
	opts   Options
	log    *slog.Logger
	health *health.Server
}

// services are the names whose health RunHealth reports, with "" for the
// server as a whole.
var services = []string{"",
	beliefv1.ModelService_ServiceDesc.ServiceName,
	beliefv1.JobService_ServiceDesc.ServiceName,
	beliefv1.QueryService_ServiceDesc.ServiceName,
}

// New returns a Server over svc without registering it.
func New(svc Service, opts Options) *Server {
	opts = opts.withDefaults()
	s := &Server{svc: svc, opts: opts, log: opts.Logger, health: health.NewServer()}
	for _, name := range services {
		s.health.SetServingStatus(name, healthpb.HealthCheckResponse_NOT_SERVING)
	}
	return s
}

// Register creates a Server over svc and registers the three services
// (and opts.Admin as AdminService when set), health and reflection on gs. Health reports NOT_SERVING until RunHealth
// has seen the service ready.
func Register(gs *grpc.Server, svc Service, opts Options) *Server {
	s := New(svc, opts)
	beliefv1.RegisterModelServiceServer(gs, s)
	beliefv1.RegisterJobServiceServer(gs, s)
	beliefv1.RegisterQueryServiceServer(gs, s)
	if opts.Admin != nil {
		beliefv1.RegisterAdminServiceServer(gs, opts.Admin)
	}
	healthpb.RegisterHealthServer(gs, s.health)
	reflection.Register(gs)
	return s
}

// Health returns the health server, for tests and for shutdown ordering.
func (s *Server) Health() *health.Server { return s.health }

// RunHealth asks Service.Ready now and every HealthInterval, and sets the
// health status of the server and of each service to SERVING or
// NOT_SERVING accordingly, until ctx ends; then it sets every status to
// NOT_SERVING for good (call it when shutting down, before GracefulStop).
func (s *Server) RunHealth(ctx context.Context) {
	t := time.NewTicker(s.opts.HealthInterval)
	defer t.Stop()
	serving := false
	first := true
	for {
		cctx, cancel := context.WithTimeout(ctx, s.opts.HealthInterval)
		err := s.svc.Ready(cctx)
		cancel()
		if ctx.Err() != nil {
			break
		}
		if now := err == nil; now != serving || first {
			st := healthpb.HealthCheckResponse_NOT_SERVING
			if now {
				st = healthpb.HealthCheckResponse_SERVING
				s.log.Info("grpc: ready")
			} else {
				s.log.Warn("grpc: not ready", "err", err)
			}
			for _, name := range services {
				s.health.SetServingStatus(name, st)
			}
			serving, first = now, false
		}
		select {
		case <-ctx.Done():
		case <-t.C:
			continue
		}
		break
	}
	s.health.Shutdown()
}

// fail maps a service error to a gRPC status error, logging server-side
// failures. fieldPrefix makes field violations paths in the request.
func (s *Server) fail(ctx context.Context, err error, fieldPrefix string) error {
	e := errmap.Map(err)
	if e.Server {
		method, _ := grpc.Method(ctx)
		s.log.Error("grpc: request failed", "method", method, "code", e.Code.String(), "err", err)
	}
	return errmap.GRPC(err, fieldPrefix)
}

// invalid is a status error for a request field at fault.
func invalid(field, format string, args ...any) error {
	return errmap.GRPC(errmap.Invalid(field, format, args...), "")
}

func recoverUnary(log *slog.Logger) grpc.UnaryServerInterceptor {
	return func(ctx context.Context, req any, info *grpc.UnaryServerInfo, handler grpc.UnaryHandler) (resp any, err error) {
		defer func() {
			if r := recover(); r != nil {
				log.Error("grpc: panic", "method", info.FullMethod, "panic", fmt.Sprint(r), "stack", string(debug.Stack()))
				err = status.Error(codes.Internal, "internal error")
			}
		}()
		return handler(ctx, req)
	}
}

func recoverStream(log *slog.Logger) grpc.StreamServerInterceptor {
	return func(srv any, ss grpc.ServerStream, info *grpc.StreamServerInfo, handler grpc.StreamHandler) (err error) {
		defer func() {
			if r := recover(); r != nil {
				log.Error("grpc: panic", "method", info.FullMethod, "panic", fmt.Sprint(r), "stack", string(debug.Stack()))
				err = status.Error(codes.Internal, "internal error")
			}
		}()
		return handler(srv, ss)
	}
}
