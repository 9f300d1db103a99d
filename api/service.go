package api

import (
	"context"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
)

// Service is what the transports need from the domain. *jobs.Service
// implements it; tests use fakes. It is owned here, by its consumers.
type Service interface {
	// PutModel validates a JSON model document and stores it as a new
	// version, unless the latest version has the same content hash.
	PutModel(ctx context.Context, doc []byte) (info jobs.ModelInfo, created bool, err error)
	// GetModel returns a model version and its document; ref is "name" or "name@version".
	GetModel(ctx context.Context, ref string) (jobs.ModelInfo, []byte, error)
	// ListModels returns a page of models and the token of the next page ("" after the last).
	ListModels(ctx context.Context, pageToken string, pageSize int) ([]jobs.ModelInfo, string, error)
	// DeleteModel removes every version of a model.
	DeleteModel(ctx context.Context, name string) error

	// Submit validates a query and creates a job (or returns the job of the
	// same idempotency key with created == false).
	Submit(ctx context.Context, q *infer.Query) (*jobs.Job, bool, error)
	// Get returns a job with its latest result.
	Get(ctx context.Context, id string) (*jobs.Job, error)
	// List returns a page of jobs, newest first.
	List(ctx context.Context, pageToken string, pageSize int) ([]*jobs.Job, string, error)
	// Cancel cancels a job; a finished job is returned unchanged.
	Cancel(ctx context.Context, id string) (*jobs.Job, error)
	// Watch sends the job now and after changes, the latest value to slow
	// readers, and closes the channel after a terminal state or when ctx ends.
	Watch(ctx context.Context, id string) (<-chan *jobs.Job, error)
	// Query answers a query synchronously under ctx's deadline.
	Query(ctx context.Context, q *infer.Query) (*infer.Result, error)
	// Ready reports whether the service can serve (its store is reachable).
	Ready(ctx context.Context) error
}
