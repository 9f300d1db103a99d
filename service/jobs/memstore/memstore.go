// Package memstore is the in-memory backend of jobs.Store, for a single
// beliefd process (`beliefd serve` without Redis) and for tests. Everything
// lives in maps under one mutex; job records are kept as JSON, exactly as a
// networked backend keeps them, so that a record read back never shares
// memory with the caller and carries only what survives encoding. Leases
// are timed by an injectable clock; finished jobs expire after their
// retention; notifications go to one-slot channels that coalesce signals.
package memstore

import (
	"container/heap"
	"context"
	"encoding/json"
	"fmt"
	"slices"
	"sort"
	"sync"
	"time"

	"github.com/beliefd/beliefd/service/jobs"
)

// Options configure a Store. The zero value is ready to use.
type Options struct {
	// Clock is the time source of leases, expiry and timestamps; default
	// time.Now.
	Clock func() time.Time
	// SkewMargin is how long after its expiry a lease may be claimed by
	// another worker, and until when its holder may still renew or commit
	// it. One process has one clock, so the default is 0.
	SkewMargin time.Duration
}

// Store is an in-memory jobs.Store. It is safe for concurrent use.
type Store struct {
	mu     sync.Mutex
	now    func() time.Time
	margin time.Duration
	closed bool

	models map[string][]modelVersion
	jobs   map[string]*entry
	idem   map[string]string // idempotency key -> job ID
	seq    int64
	expiry expiryHeap
	queued int
	runs   int
	subs   map[string]map[*sub]struct{}
}

var _ jobs.Store = (*Store)(nil)

type modelVersion struct {
	info jobs.ModelInfo
	doc  []byte
}

type entry struct {
	id       string
	data     []byte // the job record as JSON
	state    jobs.State
	priority jobs.Priority
	seq      int64
	key      string    // idempotency key
	expires  time.Time // zero until the job is finished
	blocks   map[int64]*block
	next     int64 // the next block never handed out
}

type block struct {
	worker string // lease holder; "" when released
	until  time.Time
	stats  []byte // committed statistics; nil until committed
}

type sub struct{ ch chan struct{} }

// New returns an empty Store.
func New(opt Options) *Store {
	if opt.Clock == nil {
		opt.Clock = time.Now
	}
	return &Store{
		now: opt.Clock, margin: max(0, opt.SkewMargin),
		models: map[string][]modelVersion{}, jobs: map[string]*entry{},
		idem: map[string]string{}, subs: map[string]map[*sub]struct{}{},
	}
}

// lock takes the mutex, drops expired jobs and reports a closed store.
func (s *Store) lock(ctx context.Context) error {
	if err := ctx.Err(); err != nil {
		return err
	}
	s.mu.Lock()
	if s.closed {
		s.mu.Unlock()
		return fmt.Errorf("memstore: %w: the store is closed", jobs.ErrUnavailable)
	}
	s.purge(s.now())
	return nil
}

// Ping implements jobs.Store.
func (s *Store) Ping(ctx context.Context) error {
	if err := s.lock(ctx); err != nil {
		return err
	}
	s.mu.Unlock()
	return nil
}

// Close implements jobs.Store: later calls fail with jobs.ErrUnavailable.
func (s *Store) Close() error {
	s.mu.Lock()
	defer s.mu.Unlock()
	s.closed = true
	return nil
}

// PutModel implements jobs.ModelStore.
func (s *Store) PutModel(ctx context.Context, info jobs.ModelInfo, doc []byte) (jobs.ModelInfo, bool, error) {
	if err := s.lock(ctx); err != nil {
		return jobs.ModelInfo{}, false, err
	}
	defer s.mu.Unlock()
	vs := s.models[info.Name]
	if n := len(vs); n > 0 && vs[n-1].info.Hash == info.Hash {
		return vs[n-1].info, false, nil
	}
	info.Version = 1
	if n := len(vs); n > 0 {
		info.Version = vs[n-1].info.Version + 1
	}
	info.CreatedAt = s.now()
	s.models[info.Name] = append(vs, modelVersion{info: info, doc: slices.Clone(doc)})
	return info, true, nil
}

// GetModel implements jobs.ModelStore.
func (s *Store) GetModel(ctx context.Context, name string, version int) (jobs.ModelInfo, []byte, error) {
	if err := s.lock(ctx); err != nil {
		return jobs.ModelInfo{}, nil, err
	}
	defer s.mu.Unlock()
	vs := s.models[name]
	if len(vs) == 0 {
		return jobs.ModelInfo{}, nil, fmt.Errorf("memstore: model %q: %w", name, jobs.ErrNotFound)
	}
	if version == 0 {
		v := vs[len(vs)-1]
		return v.info, slices.Clone(v.doc), nil
	}
	for _, v := range vs {
		if v.info.Version == version {
			return v.info, slices.Clone(v.doc), nil
		}
	}
	return jobs.ModelInfo{}, nil, fmt.Errorf("memstore: model %q version %d: %w", name, version, jobs.ErrNotFound)
}

// ListModels implements jobs.ModelStore.
func (s *Store) ListModels(ctx context.Context, after string, limit int) ([]jobs.ModelInfo, error) {
	if err := s.lock(ctx); err != nil {
		return nil, err
	}
	defer s.mu.Unlock()
	names := make([]string, 0, len(s.models))
	for name := range s.models {
		if name > after {
			names = append(names, name)
		}
	}
	sort.Strings(names)
	if limit > 0 && len(names) > limit {
		names = names[:limit]
	}
	out := make([]jobs.ModelInfo, len(names))
	for i, name := range names {
		vs := s.models[name]
		out[i] = vs[len(vs)-1].info
	}
	return out, nil
}

// DeleteModel implements jobs.ModelStore.
func (s *Store) DeleteModel(ctx context.Context, name string) error {
	if err := s.lock(ctx); err != nil {
		return err
	}
	defer s.mu.Unlock()
	if _, ok := s.models[name]; !ok {
		return fmt.Errorf("memstore: model %q: %w", name, jobs.ErrNotFound)
	}
	delete(s.models, name)
	return nil
}

// CreateJob implements jobs.JobStore.
func (s *Store) CreateJob(ctx context.Context, j *jobs.Job, maxUnfinished int) (*jobs.Job, bool, error) {
	if err := s.lock(ctx); err != nil {
		return nil, false, err
	}
	defer s.mu.Unlock()
	if j.ID == "" {
		return nil, false, fmt.Errorf("memstore: create job: the job has no ID")
	}
	if j.IdempotencyKey != "" {
		if id, ok := s.idem[j.IdempotencyKey]; ok {
			stored, err := decode(s.jobs[id].data)
			return stored, false, err
		}
	}
	if _, dup := s.jobs[j.ID]; dup {
		return nil, false, fmt.Errorf("memstore: create job %q: %w: the ID is taken", j.ID, jobs.ErrConflict)
	}
	if maxUnfinished > 0 && s.queued+s.runs >= maxUnfinished {
		return nil, false, fmt.Errorf("memstore: %w (%d unfinished jobs)", jobs.ErrQueueFull, s.queued+s.runs)
	}
	c := *j
	c.State = jobs.StateQueued
	data, err := json.Marshal(&c)
	if err != nil {
		return nil, false, fmt.Errorf("memstore: encode job: %w", err)
	}
	s.seq++
	e := &entry{id: c.ID, data: data, state: c.State, priority: c.Priority, seq: s.seq, key: c.IdempotencyKey, blocks: map[int64]*block{}}
	s.jobs[c.ID] = e
	s.queued++
	if e.key != "" {
		s.idem[e.key] = e.id
	}
	stored, err := decode(data)
	return stored, true, err
}

// GetJob implements jobs.JobStore.
func (s *Store) GetJob(ctx context.Context, id string) (*jobs.Job, error) {
	if err := s.lock(ctx); err != nil {
		return nil, err
	}
	defer s.mu.Unlock()
	e, ok := s.jobs[id]
	if !ok {
		return nil, fmt.Errorf("memstore: job %q: %w", id, jobs.ErrNotFound)
	}
	return decode(e.data)
}

// ListJobs implements jobs.JobStore. A job `after` that no longer exists
// gives an empty page.
func (s *Store) ListJobs(ctx context.Context, after string, limit int) ([]*jobs.Job, error) {
	if err := s.lock(ctx); err != nil {
		return nil, err
	}
	defer s.mu.Unlock()
	var below int64 = 1<<63 - 1
	if after != "" {
		e, ok := s.jobs[after]
		if !ok {
			return nil, nil
		}
		below = e.seq
	}
	es := make([]*entry, 0, len(s.jobs))
	for _, e := range s.jobs {
		if e.seq < below {
			es = append(es, e)
		}
	}
	sort.Slice(es, func(a, b int) bool { return es[a].seq > es[b].seq })
	if limit > 0 && len(es) > limit {
		es = es[:limit]
	}
	out := make([]*jobs.Job, len(es))
	for i, e := range es {
		j, err := decode(e.data)
		if err != nil {
			return nil, err
		}
		out[i] = j
	}
	return out, nil
}

// UpdateJob implements jobs.JobStore. fn runs under the store's lock, once.
func (s *Store) UpdateJob(ctx context.Context, id string, fn func(*jobs.Job) error) (*jobs.Job, error) {
	if err := s.lock(ctx); err != nil {
		return nil, err
	}
	defer s.mu.Unlock()
	e, ok := s.jobs[id]
	if !ok {
		return nil, fmt.Errorf("memstore: job %q: %w", id, jobs.ErrNotFound)
	}
	cur, err := decode(e.data)
	if err != nil {
		return nil, err
	}
	if err := fn(cur); err != nil {
		return nil, err
	}
	cur.ID = id
	data, err := json.Marshal(cur)
	if err != nil {
		return nil, fmt.Errorf("memstore: encode job %q: %w", id, err)
	}
	s.count(e.state, -1)
	s.count(cur.State, +1)
	e.data, e.state, e.priority = data, cur.State, cur.Priority
	if cur.State.Terminal() {
		exp := s.now().Add(cur.Retention)
		if cur.Retention <= 0 {
			exp = time.Time{}
		}
		if !exp.Equal(e.expires) {
			e.expires = exp
			if !exp.IsZero() {
				heap.Push(&s.expiry, expiryItem{at: exp, id: id})
			}
		}
	} else {
		e.expires = time.Time{}
	}
	return decode(data)
}

func (s *Store) count(st jobs.State, d int) {
	switch st {
	case jobs.StateQueued:
		s.queued += d
	case jobs.StateRunning:
		s.runs += d
	}
}

// Unfinished implements jobs.JobStore.
func (s *Store) Unfinished(ctx context.Context) (int, int, error) {
	if err := s.lock(ctx); err != nil {
		return 0, 0, err
	}
	defer s.mu.Unlock()
	return s.queued, s.runs, nil
}

// ClaimableJobs implements jobs.WorkQueue.
func (s *Store) ClaimableJobs(ctx context.Context, limit int) ([]string, error) {
	if err := s.lock(ctx); err != nil {
		return nil, err
	}
	defer s.mu.Unlock()
	es := make([]*entry, 0, s.queued+s.runs)
	for _, e := range s.jobs {
		if !e.state.Terminal() {
			es = append(es, e)
		}
	}
	sort.Slice(es, func(a, b int) bool {
		if es[a].priority != es[b].priority {
			return es[a].priority > es[b].priority
		}
		return es[a].seq < es[b].seq
	})
	if limit > 0 && len(es) > limit {
		es = es[:limit]
	}
	ids := make([]string, len(es))
	for i, e := range es {
		ids[i] = e.id
	}
	return ids, nil
}

// ClaimBlock implements jobs.WorkQueue: released blocks and blocks whose
// lease ended more than SkewMargin ago come first, lowest index first.
func (s *Store) ClaimBlock(ctx context.Context, jobID, worker string, limit int64, lease time.Duration) (int64, error) {
	if err := s.lock(ctx); err != nil {
		return -1, err
	}
	defer s.mu.Unlock()
	e, ok := s.jobs[jobID]
	if !ok {
		return -1, fmt.Errorf("memstore: job %q: %w", jobID, jobs.ErrNotFound)
	}
	if e.state.Terminal() {
		return -1, nil
	}
	now := s.now()
	best := int64(-1)
	for k, b := range e.blocks {
		if b.stats == nil && (b.worker == "" || now.After(b.until.Add(s.margin))) && (best < 0 || k < best) {
			best = k
		}
	}
	if best < 0 && e.next < limit {
		best = e.next
		e.next++
		e.blocks[best] = &block{}
	}
	if best >= 0 {
		b := e.blocks[best]
		b.worker, b.until = worker, now.Add(lease)
	}
	return best, nil
}

// held returns the block if worker holds its lease now.
func (s *Store) held(jobID string, k int64, worker string) *block {
	e, ok := s.jobs[jobID]
	if !ok {
		return nil
	}
	b := e.blocks[k]
	if b == nil || b.stats != nil || b.worker != worker || s.now().After(b.until.Add(s.margin)) {
		return nil
	}
	return b
}

// ExtendLease implements jobs.WorkQueue.
func (s *Store) ExtendLease(ctx context.Context, jobID string, k int64, worker string, lease time.Duration) error {
	if err := s.lock(ctx); err != nil {
		return err
	}
	defer s.mu.Unlock()
	b := s.held(jobID, k, worker)
	if b == nil {
		return fmt.Errorf("memstore: job %q block %d: %w", jobID, k, jobs.ErrLeaseLost)
	}
	b.until = s.now().Add(lease)
	return nil
}

// CommitBlock implements jobs.WorkQueue.
func (s *Store) CommitBlock(ctx context.Context, jobID string, k int64, worker string, stats []byte) error {
	if err := s.lock(ctx); err != nil {
		return err
	}
	defer s.mu.Unlock()
	if e, ok := s.jobs[jobID]; ok {
		if b := e.blocks[k]; b != nil && b.stats != nil {
			return nil // committed before: the first statistics stay
		}
	}
	b := s.held(jobID, k, worker)
	if b == nil {
		return fmt.Errorf("memstore: job %q block %d: %w", jobID, k, jobs.ErrLeaseLost)
	}
	b.stats = slices.Clone(stats)
	if b.stats == nil {
		b.stats = []byte{}
	}
	b.worker, b.until = "", time.Time{}
	return nil
}

// ReleaseBlock implements jobs.WorkQueue.
func (s *Store) ReleaseBlock(ctx context.Context, jobID string, k int64, worker string) error {
	if err := s.lock(ctx); err != nil {
		return err
	}
	defer s.mu.Unlock()
	if e, ok := s.jobs[jobID]; ok {
		if b := e.blocks[k]; b != nil && b.stats != nil {
			return nil // committed: nothing to hand back
		}
	}
	b := s.held(jobID, k, worker)
	if b == nil {
		return fmt.Errorf("memstore: job %q block %d: %w", jobID, k, jobs.ErrLeaseLost)
	}
	b.worker, b.until = "", time.Time{}
	return nil
}

// BlockStats implements jobs.WorkQueue.
func (s *Store) BlockStats(ctx context.Context, jobID string, from int64, max int) ([][]byte, error) {
	if err := s.lock(ctx); err != nil {
		return nil, err
	}
	defer s.mu.Unlock()
	e, ok := s.jobs[jobID]
	if !ok {
		return nil, fmt.Errorf("memstore: job %q: %w", jobID, jobs.ErrNotFound)
	}
	var out [][]byte
	for k := from; k >= 0 && len(out) < max; k++ {
		b := e.blocks[k]
		if b == nil || b.stats == nil {
			break
		}
		out = append(out, slices.Clone(b.stats))
	}
	return out, nil
}

// DropBlocks implements jobs.WorkQueue. Dropped blocks are never handed
// out again.
func (s *Store) DropBlocks(ctx context.Context, jobID string, below int64) error {
	if err := s.lock(ctx); err != nil {
		return err
	}
	defer s.mu.Unlock()
	e, ok := s.jobs[jobID]
	if !ok {
		return nil
	}
	for k := range e.blocks {
		if below < 0 || k < below {
			delete(e.blocks, k)
		}
	}
	return nil
}

// Notify implements jobs.Notifier.
func (s *Store) Notify(ctx context.Context, topic string) error {
	if err := s.lock(ctx); err != nil {
		return err
	}
	defer s.mu.Unlock()
	for sb := range s.subs[topic] {
		select {
		case sb.ch <- struct{}{}:
		default: // a signal is pending already
		}
	}
	return nil
}

// Subscribe implements jobs.Notifier. The channel is never closed; it
// stops receiving once cancel is called or ctx ends.
func (s *Store) Subscribe(ctx context.Context, topic string) (<-chan struct{}, func(), error) {
	if err := s.lock(ctx); err != nil {
		return nil, nil, err
	}
	defer s.mu.Unlock()
	sb := &sub{ch: make(chan struct{}, 1)}
	if s.subs[topic] == nil {
		s.subs[topic] = map[*sub]struct{}{}
	}
	s.subs[topic][sb] = struct{}{}
	remove := func() {
		s.mu.Lock()
		defer s.mu.Unlock()
		if m := s.subs[topic]; m != nil {
			delete(m, sb)
			if len(m) == 0 {
				delete(s.subs, topic)
			}
		}
	}
	stop := context.AfterFunc(ctx, remove)
	var once sync.Once
	cancel := func() {
		once.Do(func() {
			stop()
			remove()
		})
	}
	return sb.ch, cancel, nil
}

// purge drops finished jobs whose retention has run out.
func (s *Store) purge(now time.Time) {
	for len(s.expiry) > 0 && !s.expiry[0].at.After(now) {
		it := heap.Pop(&s.expiry).(expiryItem)
		e, ok := s.jobs[it.id]
		if !ok || !e.expires.Equal(it.at) {
			continue // superseded
		}
		delete(s.jobs, it.id)
		if e.key != "" && s.idem[e.key] == it.id {
			delete(s.idem, e.key)
		}
	}
}

func decode(data []byte) (*jobs.Job, error) {
	j := &jobs.Job{}
	if err := json.Unmarshal(data, j); err != nil {
		return nil, fmt.Errorf("memstore: decode job: %w", err)
	}
	return j, nil
}

type expiryItem struct {
	at time.Time
	id string
}

type expiryHeap []expiryItem

func (h expiryHeap) Len() int           { return len(h) }
func (h expiryHeap) Less(i, j int) bool { return h[i].at.Before(h[j].at) }
func (h expiryHeap) Swap(i, j int)      { h[i], h[j] = h[j], h[i] }
func (h *expiryHeap) Push(x any)        { *h = append(*h, x.(expiryItem)) }
func (h *expiryHeap) Pop() any {
	old := *h
	x := old[len(old)-1]
	*h = old[:len(old)-1]
	return x
}
