package grpcapi

import (
	"context"
	"encoding/json"
	"fmt"
	"maps"
	"math"
	"slices"
	"strings"

	"github.com/beliefd/beliefd/api/convert"
	"github.com/beliefd/beliefd/api/internal/latest"
	beliefv1 "github.com/beliefd/beliefd/proto/belief/v1"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/model"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
)

// CreateModel implements beliefv1.ModelServiceServer.
func (s *Server) CreateModel(ctx context.Context, req *beliefv1.CreateModelRequest) (*beliefv1.CreateModelResponse, error) {
	if req.GetModel() == nil {
		return nil, invalid("model", "no model given")
	}
	d := convert.ModelFromProto(req.GetModel())
	doc, err := json.Marshal(d)
	if err != nil {
		// Only numbers JSON cannot hold (NaN, infinities) get here.
		if verr := nonFinite(d); verr != nil {
			return nil, s.fail(ctx, fmt.Errorf("put model %q: %w", d.Name, verr), "model.")
		}
		return nil, s.fail(ctx, fmt.Errorf("%w: %v", model.ErrMalformed, err), "model.")
	}
	info, created, err := s.svc.PutModel(ctx, doc)
	if err != nil {
		return nil, s.fail(ctx, err, "model.")
	}
	return &beliefv1.CreateModelResponse{Info: convert.ModelInfoToProto(info), Created: created}, nil
}

// nonFinite names the numbers of a model message that are NaN or infinite
// (a JSON document cannot hold them), by variable and field as validation
// names its problems.
func nonFinite(d *model.Document) error {
	var probs []model.Problem
	check := func(v *model.Variable, field, where string, x float64) {
		if len(probs) < 25 && (math.IsNaN(x) || math.IsInf(x, 0)) {
			probs = append(probs, model.Problem{Variable: v.Name, Field: field, Message: fmt.Sprintf("%s is %v; numbers must be finite", where, x)})
		}
	}
	for i := range d.Variables {
		v := &d.Variables[i]
		for r, row := range v.Table {
			for k, x := range row {
				check(v, "table", fmt.Sprintf("row %d value %d", r, k+1), x)
			}
		}
		for r, row := range v.Rows {
			for k, x := range row.P {
				check(v, "rows", fmt.Sprintf("row %d value %d", r, k+1), x)
			}
		}
		if n := v.NoisyOR; n != nil {
			check(v, "noisy_or", "leak", n.Leak)
			for _, p := range slices.Sorted(maps.Keys(n.Links)) {
				check(v, "noisy_or", fmt.Sprintf("link for %q", p), n.Links[p])
			}
		}
		if n := v.NoisyMAX; n != nil {
			for k, x := range n.Leak {
				check(v, "noisy_max", fmt.Sprintf("leak value %d", k+1), x)
			}
			for _, p := range slices.Sorted(maps.Keys(n.Links)) {
				for _, st := range slices.Sorted(maps.Keys(n.Links[p])) {
					for k, x := range n.Links[p][st] {
						check(v, "noisy_max", fmt.Sprintf("link for %q in state %q value %d", p, st, k+1), x)
					}
				}
			}
		}
		if f := v.FailureRate; f != nil {
			check(v, "failure_rate", "lambda", f.Lambda)
			check(v, "failure_rate", "mission_time", f.MissionTime)
		}
	}
	if len(probs) == 0 {
		return nil
	}
	return &model.ValidationError{Problems: probs}
}

// GetModel implements beliefv1.ModelServiceServer.
func (s *Server) GetModel(ctx context.Context, req *beliefv1.GetModelRequest) (*beliefv1.GetModelResponse, error) {
	ref := req.GetName()
	if ref == "" {
		return nil, invalid("name", "no model name given")
	}
	if v := req.GetVersion(); v != 0 {
		if v < 0 {
			return nil, invalid("version", "version %d is not positive", v)
		}
		if strings.Contains(ref, "@") {
			return nil, invalid("version", "give the version in name (%q) or in version, not both", ref)
		}
		ref = fmt.Sprintf("%s@%d", ref, v)
	}
	info, raw, err := s.svc.GetModel(ctx, ref)
	if err != nil {
		return nil, s.fail(ctx, err, "")
	}
	doc, err := model.DecodeBytes(raw)
	if err != nil {
		return nil, s.fail(ctx, fmt.Errorf("stored model %s@%d: %w", info.Name, info.Version, errStored(err)), "")
	}
	m, err := convert.ModelToProto(doc)
	if err != nil {
		return nil, s.fail(ctx, fmt.Errorf("stored model %s@%d: %w", info.Name, info.Version, errStored(err)), "")
	}
	return &beliefv1.GetModelResponse{Info: convert.ModelInfoToProto(info), Model: m}, nil
}

// errStored hides the sentinels of a stored document that cannot be read
// back: that is the server's fault, not the caller's.
func errStored(err error) error { return fmt.Errorf("unreadable: %s", err.Error()) }

// ListModels implements beliefv1.ModelServiceServer.
func (s *Server) ListModels(ctx context.Context, req *beliefv1.ListModelsRequest) (*beliefv1.ListModelsResponse, error) {
	if req.GetPageSize() < 0 {
		return nil, invalid("page_size", "page size %d is negative", req.GetPageSize())
	}
	infos, next, err := s.svc.ListModels(ctx, req.GetPageToken(), int(req.GetPageSize()))
	if err != nil {
		return nil, s.fail(ctx, err, "")
	}
	out := &beliefv1.ListModelsResponse{NextPageToken: next, Models: make([]*beliefv1.ModelInfo, len(infos))}
	for i, info := range infos {
		out.Models[i] = convert.ModelInfoToProto(info)
	}
	return out, nil
}

// DeleteModel implements beliefv1.ModelServiceServer.
func (s *Server) DeleteModel(ctx context.Context, req *beliefv1.DeleteModelRequest) (*beliefv1.DeleteModelResponse, error) {
	if req.GetName() == "" {
		return nil, invalid("name", "no model name given")
	}
	if strings.Contains(req.GetName(), "@") {
		return nil, invalid("name", "%q names a version: delete removes every version, give the name alone", req.GetName())
	}
	if err := s.svc.DeleteModel(ctx, req.GetName()); err != nil {
		return nil, s.fail(ctx, err, "")
	}
	return &beliefv1.DeleteModelResponse{}, nil
}

// SubmitJob implements beliefv1.JobServiceServer.
func (s *Server) SubmitJob(ctx context.Context, req *beliefv1.SubmitJobRequest) (*beliefv1.SubmitJobResponse, error) {
	if req.GetQuery() == nil {
		return nil, invalid("query", "no query given")
	}
	j, created, err := s.svc.Submit(ctx, convert.QueryFromProto(req.GetQuery()))
	if err != nil {
		return nil, s.fail(ctx, err, "query.")
	}
	m, err := s.job(ctx, j)
	if err != nil {
		return nil, err
	}
	return &beliefv1.SubmitJobResponse{Job: m, Created: created}, nil
}

// GetJob implements beliefv1.JobServiceServer.
func (s *Server) GetJob(ctx context.Context, req *beliefv1.GetJobRequest) (*beliefv1.Job, error) {
	if req.GetId() == "" {
		return nil, invalid("id", "no job id given")
	}
	j, err := s.svc.Get(ctx, req.GetId())
	if err != nil {
		return nil, s.fail(ctx, err, "")
	}
	return s.job(ctx, j)
}

// CancelJob implements beliefv1.JobServiceServer.
func (s *Server) CancelJob(ctx context.Context, req *beliefv1.CancelJobRequest) (*beliefv1.Job, error) {
	if req.GetId() == "" {
		return nil, invalid("id", "no job id given")
	}
	j, err := s.svc.Cancel(ctx, req.GetId())
	if err != nil {
		return nil, s.fail(ctx, err, "")
	}
	return s.job(ctx, j)
}

// ListJobs implements beliefv1.JobServiceServer.
func (s *Server) ListJobs(ctx context.Context, req *beliefv1.ListJobsRequest) (*beliefv1.ListJobsResponse, error) {
	if req.GetPageSize() < 0 {
		return nil, invalid("page_size", "page size %d is negative", req.GetPageSize())
	}
	js, next, err := s.svc.List(ctx, req.GetPageToken(), int(req.GetPageSize()))
	if err != nil {
		return nil, s.fail(ctx, err, "")
	}
	out := &beliefv1.ListJobsResponse{NextPageToken: next, Jobs: make([]*beliefv1.Job, len(js))}
	for i, j := range js {
		if out.Jobs[i], err = s.job(ctx, j); err != nil {
			return nil, err
		}
	}
	return out, nil
}

// WatchJob implements beliefv1.JobServiceServer. It sends the job now and
// after each change and returns after sending a terminal state. Updates
// pass through a one-slot channel that is drained and refilled, so a
// reader slower than the job sees its latest state rather than a backlog.
func (s *Server) WatchJob(req *beliefv1.WatchJobRequest, stream beliefv1.JobService_WatchJobServer) error {
	if req.GetId() == "" {
		return invalid("id", "no job id given")
	}
	ctx, cancel := context.WithCancel(stream.Context())
	defer cancel() // ends the service's watch and the coalescing goroutine
	updates, err := s.svc.Watch(ctx, req.GetId())
	if err != nil {
		return s.fail(ctx, err, "")
	}
	for j := range latest.Coalesce(ctx, updates) {
		m, err := s.job(ctx, j)
		if err != nil {
			return err
		}
		if err := stream.Send(m); err != nil {
			return err
		}
		if j.State.Terminal() {
			return nil
		}
	}
	if err := ctx.Err(); err != nil {
		return s.fail(ctx, err, "")
	}
	return status.Error(codes.Unavailable, "the watch ended before the job finished; watch again")
}

// Query implements beliefv1.QueryServiceServer: synchronous, under the
// call's deadline or Options.QueryTimeout when the call has none.
func (s *Server) Query(ctx context.Context, req *beliefv1.QueryRequest) (*beliefv1.Result, error) {
	if req.GetQuery() == nil {
		return nil, invalid("query", "no query given")
	}
	if _, ok := ctx.Deadline(); !ok {
		var cancel context.CancelFunc
		ctx, cancel = context.WithTimeout(ctx, s.opts.QueryTimeout)
		defer cancel()
	}
	res, err := s.svc.Query(ctx, convert.QueryFromProto(req.GetQuery()))
	if err != nil {
		return nil, s.fail(ctx, err, "query.")
	}
	m, err := convert.ResultToProto(res)
	if err != nil {
		return nil, s.fail(ctx, err, "")
	}
	return m, nil
}

// job converts a job record; a record without a message form is a server fault.
func (s *Server) job(ctx context.Context, j *jobs.Job) (*beliefv1.Job, error) {
	m, err := convert.JobToProto(j)
	if err != nil {
		return nil, s.fail(ctx, err, "")
	}
	return m, nil
}
