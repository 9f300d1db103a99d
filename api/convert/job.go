package convert

import (
	"fmt"

	beliefv1 "github.com/beliefd/beliefd/proto/belief/v1"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/sampling"
	"google.golang.org/protobuf/types/known/durationpb"
)

// StateToProto converts a job state; "" is unspecified.
func StateToProto(s jobs.State) (beliefv1.JobState, error) {
	switch s {
	case "":
		return beliefv1.JobState_JOB_STATE_UNSPECIFIED, nil
	case jobs.StateQueued:
		return beliefv1.JobState_JOB_STATE_QUEUED, nil
	case jobs.StateRunning:
		return beliefv1.JobState_JOB_STATE_RUNNING, nil
	case jobs.StateSucceeded:
		return beliefv1.JobState_JOB_STATE_SUCCEEDED, nil
	case jobs.StateFailed:
		return beliefv1.JobState_JOB_STATE_FAILED, nil
	case jobs.StateCancelled:
		return beliefv1.JobState_JOB_STATE_CANCELLED, nil
	}
	return 0, fmt.Errorf("%w: job state %q", ErrUnrepresentable, s)
}

// StateFromProto converts a job state; unspecified and unknown values are "".
func StateFromProto(s beliefv1.JobState) jobs.State {
	switch s {
	case beliefv1.JobState_JOB_STATE_QUEUED:
		return jobs.StateQueued
	case beliefv1.JobState_JOB_STATE_RUNNING:
		return jobs.StateRunning
	case beliefv1.JobState_JOB_STATE_SUCCEEDED:
		return jobs.StateSucceeded
	case beliefv1.JobState_JOB_STATE_FAILED:
		return jobs.StateFailed
	case beliefv1.JobState_JOB_STATE_CANCELLED:
		return jobs.StateCancelled
	}
	return ""
}

// PriorityToProto converts a job priority.
func PriorityToProto(p jobs.Priority) (beliefv1.Priority, error) {
	switch p {
	case jobs.PriorityLow:
		return beliefv1.Priority_PRIORITY_LOW, nil
	case jobs.PriorityNormal:
		return beliefv1.Priority_PRIORITY_NORMAL, nil
	case jobs.PriorityHigh:
		return beliefv1.Priority_PRIORITY_HIGH, nil
	}
	return 0, fmt.Errorf("%w: job priority %d", ErrUnrepresentable, int(p))
}

// PriorityFromProto converts a job priority; unspecified is normal.
func PriorityFromProto(p beliefv1.Priority) (jobs.Priority, error) {
	switch p {
	case beliefv1.Priority_PRIORITY_LOW:
		return jobs.PriorityLow, nil
	case beliefv1.Priority_PRIORITY_NORMAL, beliefv1.Priority_PRIORITY_UNSPECIFIED:
		return jobs.PriorityNormal, nil
	case beliefv1.Priority_PRIORITY_HIGH:
		return jobs.PriorityHigh, nil
	}
	return 0, fmt.Errorf("%w: priority %d", ErrUnrepresentable, int32(p))
}

// JobToProto converts a job record to its message, without the merged
// sampler statistics.
func JobToProto(j *jobs.Job) (*beliefv1.Job, error) {
	if j == nil {
		return nil, nil
	}
	state, err := StateToProto(j.State)
	if err != nil {
		return nil, fmt.Errorf("convert job: %w", err)
	}
	prio, err := PriorityToProto(j.Priority)
	if err != nil {
		return nil, fmt.Errorf("convert job: %w", err)
	}
	res, err := ResultToProto(j.Result)
	if err != nil {
		return nil, fmt.Errorf("convert job: %w", err)
	}
	m := &beliefv1.Job{
		Id:             j.ID,
		State:          state,
		Priority:       prio,
		Query:          QueryToProto(&j.Query),
		Model:          ModelInfoToProto(j.Model),
		Method:         j.Method,
		MethodReason:   j.MethodReason,
		Seed:           j.Seed,
		Stop:           stopToProto(j.Stop),
		BlockSize:      int64(j.BlockSize),
		Blocks:         j.Blocks,
		MergedBlocks:   j.MergedBlocks,
		Result:         res,
		ResultAt:       timeToProto(j.ResultAt),
		Error:          j.Error,
		IdempotencyKey: j.IdempotencyKey,
		Tenant:         j.Tenant,
		CreatedAt:      timeToProto(j.CreatedAt),
		StartedAt:      timeToProto(j.StartedAt),
		UpdatedAt:      timeToProto(j.UpdatedAt),
		FinishedAt:     timeToProto(j.FinishedAt),
		Deadline:       timeToProto(j.Deadline),
		Retention:      durationpb.New(j.Retention),
	}
	return m, nil
}

func stopToProto(s sampling.Stop) *beliefv1.EffectiveStop {
	m := &beliefv1.EffectiveStop{MaxSamples: s.MaxSamples, AbsErr: s.AbsErr, RelErr: s.RelErr, Confidence: s.Confidence}
	if s.Timeout != 0 {
		m.Timeout = durationpb.New(s.Timeout)
	}
	return m
}

// JobFromProto converts a job message to a job record (with no merged
// statistics). Errors name a priority outside the known ones.
func JobFromProto(m *beliefv1.Job) (*jobs.Job, error) {
	if m == nil {
		return nil, nil
	}
	prio, err := PriorityFromProto(m.GetPriority())
	if err != nil {
		return nil, fmt.Errorf("convert job: %w", err)
	}
	j := &jobs.Job{
		ID:             m.GetId(),
		State:          StateFromProto(m.GetState()),
		Priority:       prio,
		Model:          ModelInfoFromProto(m.GetModel()),
		Method:         m.GetMethod(),
		MethodReason:   m.GetMethodReason(),
		Seed:           m.GetSeed(),
		BlockSize:      int(m.GetBlockSize()),
		Blocks:         m.GetBlocks(),
		MergedBlocks:   m.GetMergedBlocks(),
		Result:         ResultFromProto(m.GetResult()),
		ResultAt:       timeFromProto(m.GetResultAt()),
		Error:          m.GetError(),
		IdempotencyKey: m.GetIdempotencyKey(),
		Tenant:         m.GetTenant(),
		CreatedAt:      timeFromProto(m.GetCreatedAt()),
		StartedAt:      timeFromProto(m.GetStartedAt()),
		UpdatedAt:      timeFromProto(m.GetUpdatedAt()),
		FinishedAt:     timeFromProto(m.GetFinishedAt()),
		Deadline:       timeFromProto(m.GetDeadline()),
		Retention:      m.GetRetention().AsDuration(),
	}
	if q := QueryFromProto(m.GetQuery()); q != nil {
		j.Query = *q
	}
	if s := m.GetStop(); s != nil {
		j.Stop = sampling.Stop{MaxSamples: s.GetMaxSamples(), AbsErr: s.GetAbsErr(), RelErr: s.GetRelErr(), Confidence: s.GetConfidence()}
		if s.GetTimeout() != nil {
			j.Stop.Timeout = s.GetTimeout().AsDuration()
		}
	}
	return j, nil
}
