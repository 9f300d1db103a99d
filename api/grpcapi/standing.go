package grpcapi

import (
	"context"
	"log/slog"
	"time"

	"github.com/beliefd/beliefd/api"
	"github.com/beliefd/beliefd/api/convert"
	"github.com/beliefd/beliefd/api/errmap"
	beliefv1 "github.com/beliefd/beliefd/proto/belief/v1"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/standing"
	"google.golang.org/grpc"
	"google.golang.org/protobuf/types/known/timestamppb"
)

// StandingServer implements beliefv1.StandingQueryServiceServer over an
// api.StandingService (*standing.Service).
type StandingServer struct {
	beliefv1.UnimplementedStandingQueryServiceServer

	svc api.StandingService
	log *slog.Logger
}

// RegisterStanding registers the StandingQueryService over svc on gs. It
// uses opts.Logger; the interceptors of ServerOptions (metrics, panic
// recovery, message size) apply as to the other services.
func RegisterStanding(gs *grpc.Server, svc api.StandingService, opts Options) *StandingServer {
	opts = opts.withDefaults()
	s := &StandingServer{svc: svc, log: opts.Logger}
	beliefv1.RegisterStandingQueryServiceServer(gs, s)
	return s
}

// fail maps a service error to a gRPC status error, logging server-side failures.
func (s *StandingServer) fail(ctx context.Context, err error, fieldPrefix string) error {
	if e := errmap.Map(err); e.Server {
		method, _ := grpc.Method(ctx)
		s.log.Error("grpc: request failed", "method", method, "code", e.Code.String(), "err", err)
	}
	return errmap.GRPC(err, fieldPrefix)
}

// scope addresses the tenant a request names (admins only; see standing.WithTenant).
func scope(ctx context.Context, tenant *string) context.Context {
	if tenant != nil {
		return standing.WithTenant(ctx, *tenant)
	}
	return ctx
}

// waitOf reads a wait field ("" for none).
func waitOf(s string) (time.Duration, error) {
	if s == "" {
		return 0, nil
	}
	d, err := time.ParseDuration(s)
	switch {
	case err != nil:
		return 0, invalid("wait", "%q is not a duration such as \"2s\"", s)
	case d <= 0:
		return 0, invalid("wait", "%q must be positive", s)
	case d > api.MaxStandingWait:
		return 0, invalid("wait", "%s exceeds the limit of %s", d, api.MaxStandingWait)
	}
	return d, nil
}

// CreateStandingQuery implements beliefv1.StandingQueryServiceServer.
func (s *StandingServer) CreateStandingQuery(ctx context.Context, req *beliefv1.CreateStandingQueryRequest) (*beliefv1.StandingQuery, error) {
	m := req.GetSpec()
	if m == nil {
		return nil, invalid("spec", "no standing query given")
	}
	wait, err := waitOf(req.GetWait())
	if err != nil {
		return nil, err
	}
	spec := &standing.Spec{ID: m.GetId(), Model: m.GetModel(), Targets: m.GetTargets(), Evidence: m.GetEvidence(),
		Method: m.GetMethod(), Seed: m.Seed, Interval: m.GetInterval()}
	if m.GetStop() != nil {
		spec.Stop = convert.QueryFromProto(&beliefv1.Query{Stop: m.GetStop()}).Stop
	}
	ctx = scope(ctx, req.Tenant)
	v, err := s.svc.Create(ctx, spec)
	if err != nil {
		return nil, s.fail(ctx, err, "spec.")
	}
	if wait > 0 {
		if v, err = s.svc.Wait(ctx, v.ID, v.Revision, wait); err != nil {
			return nil, s.fail(ctx, err, "")
		}
	}
	return s.toProto(ctx, v)
}

// GetStandingQuery implements beliefv1.StandingQueryServiceServer.
func (s *StandingServer) GetStandingQuery(ctx context.Context, req *beliefv1.GetStandingQueryRequest) (*beliefv1.StandingQuery, error) {
	ctx = scope(ctx, req.Tenant)
	v, err := s.svc.Get(ctx, req.GetId())
	if err != nil {
		return nil, s.fail(ctx, err, "")
	}
	return s.toProto(ctx, v)
}

// ListStandingQueries implements beliefv1.StandingQueryServiceServer.
func (s *StandingServer) ListStandingQueries(ctx context.Context, req *beliefv1.ListStandingQueriesRequest) (*beliefv1.ListStandingQueriesResponse, error) {
	ctx = scope(ctx, req.Tenant)
	vs, err := s.svc.List(ctx)
	if err != nil {
		return nil, s.fail(ctx, err, "")
	}
	out := &beliefv1.ListStandingQueriesResponse{StandingQueries: make([]*beliefv1.StandingQuery, 0, len(vs))}
	for _, v := range vs {
		m, err := s.toProto(ctx, v)
		if err != nil {
			return nil, err
		}
		out.StandingQueries = append(out.StandingQueries, m)
	}
	return out, nil
}

// DeleteStandingQuery implements beliefv1.StandingQueryServiceServer.
func (s *StandingServer) DeleteStandingQuery(ctx context.Context, req *beliefv1.DeleteStandingQueryRequest) (*beliefv1.DeleteStandingQueryResponse, error) {
	ctx = scope(ctx, req.Tenant)
	if err := s.svc.Delete(ctx, req.GetId()); err != nil {
		return nil, s.fail(ctx, err, "")
	}
	return &beliefv1.DeleteStandingQueryResponse{}, nil
}

// UpdateStandingEvidence implements beliefv1.StandingQueryServiceServer.
func (s *StandingServer) UpdateStandingEvidence(ctx context.Context, req *beliefv1.UpdateStandingEvidenceRequest) (*beliefv1.StandingQuery, error) {
	wait, err := waitOf(req.GetWait())
	if err != nil {
		return nil, err
	}
	ctx = scope(ctx, req.Tenant)
	u := &standing.Update{Set: req.GetSet(), Clear: req.GetClear(), Replace: req.GetReplace(), ExpectRevision: req.GetExpectRevision()}
	v, err := s.svc.UpdateEvidence(ctx, req.GetId(), u)
	if err != nil {
		return nil, s.fail(ctx, err, "")
	}
	if wait > 0 {
		if v, err = s.svc.Wait(ctx, v.ID, v.Revision, wait); err != nil {
			return nil, s.fail(ctx, err, "")
		}
	}
	return s.toProto(ctx, v)
}

func stamp(t time.Time) *timestamppb.Timestamp {
	if t.IsZero() {
		return nil
	}
	return timestamppb.New(t)
}

// toProto converts a view to its message; the result goes through the
// same conversion as a job's.
func (s *StandingServer) toProto(ctx context.Context, v *standing.View) (*beliefv1.StandingQuery, error) {
	m := &beliefv1.StandingQuery{
		Id: v.ID, Tenant: v.Tenant, Model: v.Model, Targets: v.Targets, Method: v.Method,
		Stop: convert.QueryToProto(&infer.Query{Stop: v.Stop}).GetStop(), Seed: v.Seed, Interval: v.Interval,
		Evidence: v.Evidence, Revision: v.Revision, EvidenceUpdatedAt: stamp(v.EvidenceUpdatedAt), CreatedAt: stamp(v.CreatedAt),
		UpdatedAt: stamp(v.UpdatedAt), Status: v.Status, ResultRevision: v.ResultRevision, ResultEvidence: v.ResultEvidence,
		ResultAt: stamp(v.ResultAt), ResultAgeSeconds: v.ResultAgeSeconds, Error: v.Error, ErrorRevision: v.ErrorRevision,
		ErrorAt: stamp(v.ErrorAt),
	}
	if v.Result != nil {
		r, err := convert.ResultToProto(v.Result)
		if err != nil {
			return nil, s.fail(ctx, err, "")
		}
		m.Result = r
	}
	return m, nil
}
