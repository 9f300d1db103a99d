package jobs

import (
	"context"
	"errors"
	"fmt"
	"time"
)

// Sentinel errors of stores. Backends wrap them; callers use errors.Is.
var (
	// ErrNotFound: no such model, model version or job.
	ErrNotFound = errors.New("not found")
	// ErrQueueFull: the queue holds as many unfinished jobs as it may.
	ErrQueueFull = errors.New("job queue is full")
	// ErrLeaseLost: the worker no longer holds the lease it acts on
	// (it expired and another worker may have the block); nothing was written.
	ErrLeaseLost = errors.New("lease lost")
	// ErrUnavailable: the backend cannot be reached now; try again later.
	ErrUnavailable = errors.New("store unavailable")
	// ErrConflict: a concurrent update won; UpdateJob retries it internally
	// and returns it only when retries run out.
	ErrConflict = errors.New("concurrent update")
)

// ModelInfo describes one stored model version.
type ModelInfo struct {
	Name      string    `json:"name"`
	Version   int       `json:"version"`
	Hash      string    `json:"hash"`
	Variables int       `json:"variables"`
	Bytes     int       `json:"bytes"`
	CreatedAt time.Time `json:"created_at"`
}

// Store is the system of record: models, jobs, the work queue, per-block
// statistics and change notifications. The memory backend serves one
// process; the Redis backend lets any number of API and worker processes
// share one Redis. Every backend passes the conformance suite in
// service/jobs/jobstest.
type Store interface {
	ModelStore
	JobStore
	WorkQueue
	Notifier
	// Ping reports whether the backend is reachable (readiness).
	Ping(ctx context.Context) error
	// Close releases the backend's resources.
	Close() error
}

// ModelStore keeps immutable, versioned model documents.
type ModelStore interface {
	// PutModel stores doc as the next version of info.Name (versions count
	// from 1) unless the latest version already has info.Hash, in which case
	// it returns that version and created == false. The returned info has
	// Version and CreatedAt set.
	PutModel(ctx context.Context, info ModelInfo, doc []byte) (stored ModelInfo, created bool, err error)
	// GetModel returns a version of a model; version 0 means the latest.
	GetModel(ctx context.Context, name string, version int) (ModelInfo, []byte, error)
	// ListModels returns the latest version of each model whose name sorts
	// after `after`, in name order, at most limit of them.
	ListModels(ctx context.Context, after string, limit int) ([]ModelInfo, error)
	// DeleteModel removes every version of a model.
	DeleteModel(ctx context.Context, name string) error
}

// AllTenants, given to ListJobs or UnfinishedOf as the tenant, means every
// tenant's jobs (for admins). It can name no tenant: tenant names hold only
// letters, digits, '.', '_' and '-' (CheckTenantName).
const AllTenants = "*"

// CreateLimits bound what CreateJob accepts. Zero fields mean no limit.
type CreateLimits struct {
	// MaxUnfinished bounds the queued and running jobs of all tenants
	// together; beyond it CreateJob fails with ErrQueueFull.
	MaxUnfinished int
	// TenantMaxUnfinished bounds the queued and running jobs of the new
	// job's tenant; beyond it CreateJob fails with an error that wraps
	// ErrQuotaExceeded and names the quota and its value.
	TenantMaxUnfinished int
}

// JobStore keeps job records. Every job belongs to one tenant (Job.Tenant,
// "" for the open tenant), fixed when it is created.
type JobStore interface {
	// CreateJob stores a new job in state queued and makes it claimable.
	// When j.IdempotencyKey was used by a job of the same tenant still
	// kept, it returns that job and created == false (keys of different
	// tenants never meet). Otherwise, when the limits would be exceeded,
	// it stores nothing and fails with ErrQuotaExceeded (j.Tenant's own
	// bound, checked first) or ErrQueueFull (all tenants). j.Tenant must
	// not be AllTenants.
	CreateJob(ctx context.Context, j *Job, lim CreateLimits) (stored *Job, created bool, err error)
	// GetJob returns a copy of the job record.
	GetJob(ctx context.Context, id string) (*Job, error)
	// ListJobs returns the jobs of tenant (of every tenant for
	// AllTenants) newest first, starting after the job with ID `after`
	// ("" for the newest), at most limit of them (all when limit <= 0). A
	// backend keeps an index per tenant: a page costs what it holds, not
	// what other tenants have.
	ListJobs(ctx context.Context, tenant, after string, limit int) ([]*Job, error)
	// UpdateJob applies fn to the current record and stores the result
	// atomically (compare-and-swap, retried on conflict; fn may run more
	// than once and must not have side effects). If fn returns an error,
	// nothing is stored and the error is returned. fn cannot change the
	// job's ID or tenant. When the stored job reaches a terminal state it
	// stops being claimable, stops counting as unfinished, and its record
	// expires after its Retention.
	UpdateJob(ctx context.Context, id string, fn func(*Job) error) (*Job, error)
	// Unfinished counts queued and running jobs of all tenants (queue depth).
	Unfinished(ctx context.Context) (queued, running int, err error)
	// UnfinishedOf counts the queued and running jobs of one tenant (of
	// all tenants for AllTenants).
	UnfinishedOf(ctx context.Context, tenant string) (queued, running int, err error)
}

// Claimable is an unfinished job that may have work, as ClaimableJobs
// lists it.
type Claimable struct {
	ID       string
	Tenant   string
	Priority Priority
}

// WorkQueue hands out the blocks of unfinished jobs under leases.
type WorkQueue interface {
	// ClaimableJobs lists unfinished jobs that may have work: for every
	// tenant with unfinished jobs, its first limit jobs (all when limit
	// <= 0) by priority, highest first, oldest first within a priority.
	// Tenants follow one another in name order, each tenant's jobs in a
	// run. Limiting per tenant keeps every tenant's work in view however
	// much another tenant has queued; the order among tenants is the
	// scheduler's business (fair.go).
	ClaimableJobs(ctx context.Context, limit int) ([]Claimable, error)
	// ClaimBlock leases a block of job jobID to worker until now+lease: a
	// block whose lease expired (more than the backend's clock-skew margin
	// ago) and that has no committed statistics, else the next block never
	// handed out, if it is below limit. It returns -1 when there is none now.
	// Claiming and recording the lease are one atomic step.
	ClaimBlock(ctx context.Context, jobID, worker string, limit int64, lease time.Duration) (int64, error)
	// ExtendLease pushes the lease of a held block to now+lease, or
	// returns ErrLeaseLost.
	ExtendLease(ctx context.Context, jobID string, block int64, worker string, lease time.Duration) error
	// CommitBlock stores the statistics of a block and drops its lease,
	// atomically, if worker still holds the lease; a block already
	// committed keeps its first statistics (idempotent: the call succeeds and
	// changes nothing). Without the lease it returns ErrLeaseLost and writes nothing.
	CommitBlock(ctx context.Context, jobID string, block int64, worker string, stats []byte) error
	// ReleaseBlock hands a held block back (on shutdown) so another worker
	// can claim it at once.
	ReleaseBlock(ctx context.Context, jobID string, block int64, worker string) error
	// BlockStats returns the committed statistics of blocks from, from+1, ...
	// stopping at the first block without statistics or after max blocks.
	BlockStats(ctx context.Context, jobID string, from int64, max int) ([][]byte, error)
	// DropBlocks deletes the leases and statistics of blocks below `below`
	// (all of them when below < 0), for merged or finished jobs.
	DropBlocks(ctx context.Context, jobID string, below int64) error
}

// Notifier carries change notifications. Delivery is best effort: a
// subscriber must re-read the record it cares about after each signal and
// also poll now and then.
type Notifier interface {
	// Notify signals a change of topic (a job ID, or TopicQueue for new work).
	Notify(ctx context.Context, topic string) error
	// Subscribe returns a channel that receives a value after changes of
	// topic (coalesced: one pending signal at most) until cancel is called
	// or ctx ends.
	Subscribe(ctx context.Context, topic string) (signals <-chan struct{}, cancel func(), err error)
}

// TopicQueue is the notification topic for new or returned work.
const TopicQueue = "queue"

// TenantQuotaError is the error CreateJob returns when the tenant of the
// new job has unfinished queued or running jobs and may have at most max:
// it wraps ErrQuotaExceeded and names the quota, its value and the tenant.
func TenantQuotaError(tenant string, unfinished, max int) error {
	who := "the open tenant"
	if tenant != "" {
		who = fmt.Sprintf("tenant %q", tenant)
	}
	return fmt.Errorf("%w: max_unfinished of %s is %d; it has %d queued or running jobs", ErrQuotaExceeded, who, max, unfinished)
}
