package httpapi

import (
	"time"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/sampling"
)

// jobView is the body of GET /v1/jobs/{id}, of POST /v1/jobs and of each
// event of GET /v1/jobs/{id}/events: the job's result document (partial
// while it runs) with its fields at the top level, unchanged, plus "id" and
// a "job" object with the job's metadata. A client that reads result
// documents reads this one too.
type jobView struct {
	ID string `json:"id"`
	*infer.Result
	Job jobInfo `json:"job"`
}

// jobInfo is a job's metadata; GET /v1/jobs lists these.
type jobInfo struct {
	ID             string         `json:"id"`
	State          jobs.State     `json:"state"`
	Priority       string         `json:"priority"`
	Model          jobs.ModelInfo `json:"model"`
	Query          infer.Query    `json:"query"`
	Method         string         `json:"method"`
	Seed           uint64         `json:"seed"`
	Blocks         int64          `json:"blocks"`
	MergedBlocks   int64          `json:"merged_blocks"`
	ResultAt       time.Time      `json:"result_at,omitzero"`
	Error          string         `json:"error,omitempty"`
	IdempotencyKey string         `json:"idempotency_key,omitempty"`
	Tenant         string         `json:"tenant,omitempty"`
	CreatedAt      time.Time      `json:"created_at"`
	StartedAt      time.Time      `json:"started_at,omitzero"`
	UpdatedAt      time.Time      `json:"updated_at"`
	FinishedAt     time.Time      `json:"finished_at,omitzero"`
	Deadline       time.Time      `json:"deadline,omitzero"`
}

func newJobInfo(j *jobs.Job) jobInfo {
	return jobInfo{
		ID: j.ID, State: j.State, Priority: j.Priority.String(), Model: j.Model, Query: j.Query,
		Method: j.Method, Seed: j.Seed, Blocks: j.Blocks, MergedBlocks: j.MergedBlocks, ResultAt: j.ResultAt,
		Error: j.Error, IdempotencyKey: j.IdempotencyKey, Tenant: j.Tenant,
		CreatedAt: j.CreatedAt, StartedAt: j.StartedAt, UpdatedAt: j.UpdatedAt, FinishedAt: j.FinishedAt, Deadline: j.Deadline,
	}
}

// newJobView shapes a job for a response. Before the first partial result
// the result part has the job's method and seed, no marginals and no
// samples. Its "state" is always the job's.
func newJobView(j *jobs.Job) jobView {
	var res infer.Result
	if j.Result != nil {
		res = *j.Result
	} else {
		res = infer.Result{
			Model: j.Model.Name, ModelHash: j.Model.Hash, Method: j.Method, MethodReason: j.MethodReason,
			Seed: j.Seed, Confidence: j.Stop.Confidence, Marginals: map[string]map[string]sampling.Interval{},
			Caution: infer.Caution,
		}
	}
	res.State = string(j.State)
	return jobView{ID: j.ID, Result: &res, Job: newJobInfo(j)}
}
