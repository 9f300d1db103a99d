// Package fakesvc is an in-memory stand-in for the domain service, for the
// transport tests. It validates with the real model and query code, so
// errors are the ones the service returns, and answers queries with the
// real infer.Runner; jobs do not run by themselves: tests move them with
// Update.
package fakesvc

import (
	"context"
	"errors"
	"fmt"
	"slices"
	"sort"
	"strconv"
	"strings"
	"sync"
	"time"

	"github.com/beliefd/beliefd/api"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/model"
)

type version struct {
	info jobs.ModelInfo
	doc  []byte
	net  *model.Network
}

// Service implements api.Service in memory. Set the exported fields before use.
type Service struct {
	// Fail, when set, is asked before each call with the call's context and
	// the method name ("PutModel", "Submit", ...); a non-nil error is
	// returned as is.
	Fail func(ctx context.Context, method string) error
	// WatchFunc, when set, replaces Watch.
	WatchFunc func(ctx context.Context, id string) (<-chan *jobs.Job, error)
	// MaxUnfinished, when > 0, bounds queued and running jobs (ErrQueueFull beyond).
	MaxUnfinished int
	// Now is the clock; default time.Now.
	Now func() time.Time

	mu       sync.Mutex
	models   map[string][]version
	jobs     map[string]*jobs.Job
	order    []string // job IDs, oldest first
	next     int
	watchers map[string][]chan *jobs.Job
	runner   *infer.Runner
}

var _ api.Service = (*Service)(nil)

// New returns an empty fake service.
func New() *Service {
	return &Service{models: map[string][]version{}, jobs: map[string]*jobs.Job{}, watchers: map[string][]chan *jobs.Job{},
		runner: infer.NewRunner(infer.Options{Workers: 1})}
}

func (s *Service) now() time.Time {
	if s.Now != nil {
		return s.Now()
	}
	return time.Now().UTC()
}

func (s *Service) fail(ctx context.Context, method string) error {
	if s.Fail != nil {
		return s.Fail(ctx, method)
	}
	return nil
}

// PutModel decodes and compiles doc and stores it as a new version unless
// the latest has the same hash.
func (s *Service) PutModel(ctx context.Context, doc []byte) (jobs.ModelInfo, bool, error) {
	if err := s.fail(ctx, "PutModel"); err != nil {
		return jobs.ModelInfo{}, false, err
	}
	d, err := model.DecodeBytes(doc)
	if err != nil {
		return jobs.ModelInfo{}, false, fmt.Errorf("put model: %w", err)
	}
	if d.Name == "" {
		return jobs.ModelInfo{}, false, fmt.Errorf("put model: %w: the model has no name", model.ErrInvalid)
	}
	net, err := model.Compile(d, model.Limits{})
	if err != nil {
		return jobs.ModelInfo{}, false, fmt.Errorf("put model %q: %w", d.Name, err)
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	vs := s.models[d.Name]
	if len(vs) > 0 && vs[len(vs)-1].info.Hash == net.Hash {
		return vs[len(vs)-1].info, false, nil
	}
	info := jobs.ModelInfo{Name: d.Name, Version: len(vs) + 1, Hash: net.Hash, Variables: len(net.Vars), Bytes: len(doc), CreatedAt: s.now()}
	s.models[d.Name] = append(vs, version{info: info, doc: append([]byte(nil), doc...), net: net})
	return info, true, nil
}

func (s *Service) lookup(ref string) (version, error) {
	name, v, found := strings.Cut(ref, "@")
	n := 0
	if found {
		var err error
		if n, err = strconv.Atoi(v); err != nil || n < 1 {
			return version{}, fmt.Errorf("%w: model reference %q: version %q is not a positive integer", infer.ErrBadQuery, ref, v)
		}
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	vs := s.models[name]
	if len(vs) == 0 || n > len(vs) {
		return version{}, fmt.Errorf("model %q: %w", ref, jobs.ErrNotFound)
	}
	if n == 0 {
		n = len(vs)
	}
	return vs[n-1], nil
}

// GetModel returns a stored version.
func (s *Service) GetModel(ctx context.Context, ref string) (jobs.ModelInfo, []byte, error) {
	if err := s.fail(ctx, "GetModel"); err != nil {
		return jobs.ModelInfo{}, nil, err
	}
	v, err := s.lookup(ref)
	if err != nil {
		return jobs.ModelInfo{}, nil, fmt.Errorf("get model: %w", err)
	}
	return v.info, v.doc, nil
}

// pageSize is the default page size of the fake.
const pageSize = 2

// ListModels lists latest versions by name; the page token is the last name.
func (s *Service) ListModels(ctx context.Context, pageToken string, size int) ([]jobs.ModelInfo, string, error) {
	if err := s.fail(ctx, "ListModels"); err != nil {
		return nil, "", err
	}
	if size <= 0 {
		size = pageSize
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	var names []string
	for n := range s.models {
		if n > pageToken {
			names = append(names, n)
		}
	}
	sort.Strings(names)
	next := ""
	if len(names) > size {
		names = names[:size]
		next = names[size-1]
	}
	out := make([]jobs.ModelInfo, len(names))
	for i, n := range names {
		vs := s.models[n]
		out[i] = vs[len(vs)-1].info
	}
	return out, next, nil
}

// DeleteModel removes every version.
func (s *Service) DeleteModel(ctx context.Context, name string) error {
	if err := s.fail(ctx, "DeleteModel"); err != nil {
		return err
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	if _, ok := s.models[name]; !ok {
		return fmt.Errorf("delete model %q: %w", name, jobs.ErrNotFound)
	}
	delete(s.models, name)
	return nil
}

// Submit validates q against its model and stores a queued job.
func (s *Service) Submit(ctx context.Context, q *infer.Query) (*jobs.Job, bool, error) {
	if err := s.fail(ctx, "Submit"); err != nil {
		return nil, false, err
	}
	qc := *q
	if err := qc.Validate(); err != nil {
		return nil, false, fmt.Errorf("submit: %w", err)
	}
	prio, err := jobs.ParsePriority(qc.Priority)
	if err != nil {
		return nil, false, fmt.Errorf("submit: %w", err)
	}
	v, err := s.lookup(qc.Model)
	if err != nil {
		return nil, false, fmt.Errorf("submit: %w", err)
	}
	ev, err := v.net.ResolveEvidence(qc.Evidence, qc.SoftEvidence)
	if err != nil {
		return nil, false, fmt.Errorf("submit: %w", err)
	}
	if _, err := v.net.ResolveTargets(qc.Targets, ev); err != nil {
		return nil, false, fmt.Errorf("submit: %w", err)
	}
	stop, _ := qc.Stop.Sampling()
	s.mu.Lock()
	defer s.mu.Unlock()
	if qc.IdempotencyKey != "" {
		for _, id := range s.order {
			if j := s.jobs[id]; j.IdempotencyKey == qc.IdempotencyKey {
				return j.Clone(), false, nil
			}
		}
	}
	if s.MaxUnfinished > 0 {
		n := 0
		for _, j := range s.jobs {
			if !j.State.Terminal() {
				n++
			}
		}
		if n >= s.MaxUnfinished {
			return nil, false, fmt.Errorf("submit: %w", jobs.ErrQueueFull)
		}
	}
	s.next++
	now := s.now()
	var seed uint64 = 1
	if qc.Seed != nil {
		seed = *qc.Seed
	}
	j := &jobs.Job{
		ID: fmt.Sprintf("job-%d", s.next), State: jobs.StateQueued, Priority: prio, Query: qc, Model: v.info,
		Method: qc.Method, Seed: seed, Stop: stop, Blocks: 1, IdempotencyKey: qc.IdempotencyKey,
		CreatedAt: now, UpdatedAt: now, Retention: 24 * time.Hour,
	}
	s.jobs[j.ID] = j
	s.order = append(s.order, j.ID)
	return j.Clone(), true, nil
}

// Get returns a job.
func (s *Service) Get(ctx context.Context, id string) (*jobs.Job, error) {
	if err := s.fail(ctx, "Get"); err != nil {
		return nil, err
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	j, ok := s.jobs[id]
	if !ok {
		return nil, fmt.Errorf("get job %q: %w", id, jobs.ErrNotFound)
	}
	return j.Clone(), nil
}

// List returns jobs newest first; the page token is the last ID.
func (s *Service) List(ctx context.Context, pageToken string, size int) ([]*jobs.Job, string, error) {
	if err := s.fail(ctx, "List"); err != nil {
		return nil, "", err
	}
	if size <= 0 {
		size = pageSize
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	ids := slices.Clone(s.order)
	slices.Reverse(ids)
	if pageToken != "" {
		i := slices.Index(ids, pageToken)
		if i < 0 {
			return nil, "", fmt.Errorf("list jobs: %w: page token %q is not one this service returned", infer.ErrBadQuery, pageToken)
		}
		ids = ids[i+1:]
	}
	next := ""
	if len(ids) > size {
		ids = ids[:size]
		next = ids[size-1]
	}
	out := make([]*jobs.Job, len(ids))
	for i, id := range ids {
		out[i] = s.jobs[id].Clone()
	}
	return out, next, nil
}

// Cancel moves an unfinished job to cancelled.
func (s *Service) Cancel(ctx context.Context, id string) (*jobs.Job, error) {
	if err := s.fail(ctx, "Cancel"); err != nil {
		return nil, err
	}
	return s.Update(id, func(j *jobs.Job) {
		if !j.State.Terminal() {
			j.State = jobs.StateCancelled
			j.FinishedAt = s.now()
			if j.Result != nil {
				r := *j.Result
				r.StopReason = "cancelled"
				j.Result = &r
			}
		}
	})
}

// Update changes a job (as the workers would), mirrors its state into its
// result, and wakes its watchers.
func (s *Service) Update(id string, fn func(*jobs.Job)) (*jobs.Job, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	j, ok := s.jobs[id]
	if !ok {
		return nil, fmt.Errorf("job %q: %w", id, jobs.ErrNotFound)
	}
	c := j.Clone()
	fn(c)
	c.UpdatedAt = s.now()
	if c.Result != nil {
		r := *c.Result
		r.State = string(c.State)
		c.Result = &r
	}
	s.jobs[id] = c
	for _, ch := range s.watchers[id] {
		offer(ch, c.Clone())
	}
	if c.State.Terminal() {
		for _, ch := range s.watchers[id] {
			close(ch)
		}
		delete(s.watchers, id)
	}
	return c.Clone(), nil
}

// offer puts j in the one-slot channel ch, replacing what is there.
func offer(ch chan *jobs.Job, j *jobs.Job) {
	select {
	case <-ch:
	default:
	}
	ch <- j
}

// Watch sends the job now and after each Update; it closes the channel
// after a terminal state or when ctx ends.
func (s *Service) Watch(ctx context.Context, id string) (<-chan *jobs.Job, error) {
	if s.WatchFunc != nil {
		return s.WatchFunc(ctx, id)
	}
	if err := s.fail(ctx, "Watch"); err != nil {
		return nil, err
	}
	s.mu.Lock()
	defer s.mu.Unlock()
	j, ok := s.jobs[id]
	if !ok {
		return nil, fmt.Errorf("watch job %q: %w", id, jobs.ErrNotFound)
	}
	ch := make(chan *jobs.Job, 1)
	ch <- j.Clone()
	if j.State.Terminal() {
		close(ch)
		return ch, nil
	}
	s.watchers[id] = append(s.watchers[id], ch)
	go func() {
		<-ctx.Done()
		s.mu.Lock()
		defer s.mu.Unlock()
		ws := s.watchers[id]
		if i := slices.Index(ws, ch); i >= 0 {
			s.watchers[id] = slices.Delete(ws, i, i+1)
			close(ch)
		}
	}()
	return ch, nil
}

// Watchers reports how many watches of a job are open.
func (s *Service) Watchers(id string) int {
	s.mu.Lock()
	defer s.mu.Unlock()
	return len(s.watchers[id])
}

// Query answers q with the real runner.
func (s *Service) Query(ctx context.Context, q *infer.Query) (*infer.Result, error) {
	if err := s.fail(ctx, "Query"); err != nil {
		return nil, err
	}
	qc := *q
	if err := qc.Validate(); err != nil {
		return nil, fmt.Errorf("query: %w", err)
	}
	v, err := s.lookup(qc.Model)
	if err != nil {
		return nil, fmt.Errorf("query: %w", err)
	}
	res, err := s.runner.Run(ctx, v.net, &qc, nil)
	if err != nil {
		return nil, fmt.Errorf("query: %w", err)
	}
	return res, nil
}

// Ready fails when Fail("Ready") does.
func (s *Service) Ready(ctx context.Context) error {
	if err := s.fail(ctx, "Ready"); err != nil {
		return fmt.Errorf("ready: %w", err)
	}
	return ctx.Err()
}

// ErrInjected is a plain error for tests of the internal-error path.
var ErrInjected = errors.New("injected failure with secret detail")
