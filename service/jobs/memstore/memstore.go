// Package memstore is the in-memory backend of jobs.Store, for a single
// beliefd process (`beliefd serve` without Redis) and for tests. Everything
// lives in maps under one mutex; job records are kept as JSON, exactly as a
// networked backend keeps them, so that a record read back never shares
// memory with the caller and carries only what survives encoding. Leases
// are timed by an injectable clock; finished jobs expire after their
// retention; notifications go to one-slot channels that coalesce signals.
//
// Jobs are indexed by tenant: each tenant has its own creation-ordered
// list (ListJobs), its own set of unfinished jobs (ClaimableJobs, quotas)
// and its own idempotency keys, so that what one tenant does costs another
// tenant's calls nothing.
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

	models  map[string][]modelVersion
	jobs    map[string]*entry
	idem    map[idemKey]string // idempotency key of a tenant -> job ID
	seq     int64
	expiry  expiryHeap
	all     index              // every job, in creation order
	tenants map[string]*tenant // tenants with kept jobs
	queued  int
	runs    int
	subs    map[string]map[*sub]struct{}
}

type idemKey struct{ tenant, key string }

// tenant holds the indexes of one tenant's jobs.
type tenant struct {
	jobs       index               // kept jobs, in creation order
	unfinished map[*entry]struct{} // queued and running jobs
	queued     int
	runs       int
}

var _ jobs.Store = (*Store)(nil)

type modelVersion struct {
	info jobs.ModelInfo
	doc  []byte
}

type entry struct {
	id       string
	tenant   string
	data     []byte // the job record as JSON
	state    jobs.State
	priority jobs.Priority
	seq      int64
	key      string    // idempotency key (of the entry's tenant)
	gone     bool      // expired: left in indexes until they are compacted
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
		idem: map[idemKey]string{}, tenants: map[string]*tenant{}, subs: map[string]map[*sub]struct{}{},
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
func (s *Store) CreateJob(ctx context.Context, j *jobs.Job, lim jobs.CreateLimits) (*jobs.Job, bool, error) {
	if err := s.lock(ctx); err != nil {
		return nil, false, err
	}
	defer s.mu.Unlock()
	if j.ID == "" {
		return nil, false, fmt.Errorf("memstore: create job: the job has no ID")
	}
	if j.Tenant == jobs.AllTenants {
		return nil, false, fmt.Errorf("memstore: create job %q: tenant %q stands for all tenants and cannot own a job", j.ID, j.Tenant)
	}
	ik := idemKey{j.Tenant, j.IdempotencyKey}
	if j.IdempotencyKey != "" {
		if id, ok := s.idem[ik]; ok {
			stored, err := decode(s.jobs[id].data)
			return stored, false, err
		}
	}
	if _, dup := s.jobs[j.ID]; dup {
		return nil, false, fmt.Errorf("memstore: create job %q: %w: the ID is taken", j.ID, jobs.ErrConflict)
	}
	t := s.tenants[j.Tenant]
	if t == nil {
		t = &tenant{unfinished: map[*entry]struct{}{}}
	}
	if n := t.queued + t.runs; lim.TenantMaxUnfinished > 0 && n >= lim.TenantMaxUnfinished {
		return nil, false, fmt.Errorf("memstore: create job: %w", jobs.TenantQuotaError(j.Tenant, n, lim.TenantMaxUnfinished))
	}
	if lim.MaxUnfinished > 0 && s.queued+s.runs >= lim.MaxUnfinished {
		return nil, false, fmt.Errorf("memstore: %w (%d unfinished jobs)", jobs.ErrQueueFull, s.queued+s.runs)
	}
	c := *j
	c.State = jobs.StateQueued
	data, err := json.Marshal(&c)
	if err != nil {
		return nil, false, fmt.Errorf("memstore: encode job: %w", err)
	}
	s.seq++
	e := &entry{id: c.ID, tenant: c.Tenant, data: data, state: c.State, priority: c.Priority, seq: s.seq, key: c.IdempotencyKey, blocks: map[int64]*block{}}
	s.tenants[c.Tenant] = t
	s.jobs[c.ID] = e
	s.all.add(e)
	t.jobs.add(e)
	s.count(e, +1)
	if e.key != "" {
		s.idem[ik] = e.id
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
func (s *Store) ListJobs(ctx context.Context, tenant, after string, limit int) ([]*jobs.Job, error) {
	if err := s.lock(ctx); err != nil {
		return nil, err
	}
	defer s.mu.Unlock()
	ix := &s.all
	if tenant != jobs.AllTenants {
		t, ok := s.tenants[tenant]
		if !ok {
			return nil, nil
		}
		ix = &t.jobs
	}
	var below int64 = 1<<63 - 1
	if after != "" {
		e, ok := s.jobs[after]
		if !ok || tenant != jobs.AllTenants && e.tenant != tenant {
			return nil, nil
		}
		below = e.seq
	}
	var out []*jobs.Job
	for _, e := range ix.before(below, limit) {
		j, err := decode(e.data)
		if err != nil {
			return nil, err
		}
		out = append(out, j)
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
	cur.ID, cur.Tenant = id, e.tenant
	data, err := json.Marshal(cur)
	if err != nil {
		return nil, fmt.Errorf("memstore: encode job %q: %w", id, err)
	}
	s.count(e, -1)
	e.data, e.state, e.priority = data, cur.State, cur.Priority
	s.count(e, +1)
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

// count adds d to the counts of e's state, and keeps e in its tenant's
// set of unfinished jobs while it is unfinished.
func (s *Store) count(e *entry, d int) {
	t := s.tenants[e.tenant]
	switch e.state {
	case jobs.StateQueued:
		s.queued += d
		t.queued += d
	case jobs.StateRunning:
		s.runs += d
		t.runs += d
	default:
		return
	}
	if d > 0 {
		t.unfinished[e] = struct{}{}
	} else {
		delete(t.unfinished, e)
	}
}

// Unfinished implements jobs.JobStore.
func (s *Store) Unfinished(ctx context.Context) (int, int, error) {
	return s.UnfinishedOf(ctx, jobs.AllTenants)
}

// UnfinishedOf implements jobs.JobStore.
func (s *Store) UnfinishedOf(ctx context.Context, tenant string) (int, int, error) {
	if err := s.lock(ctx); err != nil {
		return 0, 0, err
	}
	defer s.mu.Unlock()
	if tenant == jobs.AllTenants {
		return s.queued, s.runs, nil
	}
	if t, ok := s.tenants[tenant]; ok {
		return t.queued, t.runs, nil
	}
	return 0, 0, nil
}

// ClaimableJobs implements jobs.WorkQueue.
func (s *Store) ClaimableJobs(ctx context.Context, limit int) ([]jobs.Claimable, error) {
	if err := s.lock(ctx); err != nil {
		return nil, err
	}
	defer s.mu.Unlock()
	names := make([]string, 0, len(s.tenants))
	for name, t := range s.tenants {
		if len(t.unfinished) > 0 {
			names = append(names, name)
		}
	}
	sort.Strings(names)
	var out []jobs.Claimable
	for _, name := range names {
		es := make([]*entry, 0, len(s.tenants[name].unfinished))
		for e := range s.tenants[name].unfinished {
			es = append(es, e)
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
		for _, e := range es {
			out = append(out, jobs.Claimable{ID: e.id, Tenant: e.tenant, Priority: e.priority})
		}
	}
	return out, nil
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
		if ik := (idemKey{e.tenant, e.key}); e.key != "" && s.idem[ik] == it.id {
			delete(s.idem, ik)
		}
		e.gone = true
		s.all.drop()
		t := s.tenants[e.tenant]
		t.jobs.drop()
		if t.jobs.live() == 0 {
			delete(s.tenants, e.tenant)
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

// index lists entries in creation order. Expired entries are marked gone
// and left in place until they make up half of the list, so that removal
// costs amortised O(1).
type index struct {
	es   []*entry
	dead int
}

func (ix *index) add(e *entry) { ix.es = append(ix.es, e) }

// live counts the entries not gone.
func (ix *index) live() int { return len(ix.es) - ix.dead }

// drop records that one of the entries is now gone, compacting the list
// when half of it is.
func (ix *index) drop() {
	ix.dead++
	if ix.dead*2 < len(ix.es) {
		return
	}
	kept := ix.es[:0]
	for _, e := range ix.es {
		if !e.gone {
			kept = append(kept, e)
		}
	}
	clear(ix.es[len(kept):])
	ix.es, ix.dead = kept, 0
}

// before returns up to limit entries (all when limit <= 0) created before
// sequence number below, newest first.
func (ix *index) before(below int64, limit int) []*entry {
	i := sort.Search(len(ix.es), func(i int) bool { return ix.es[i].seq >= below })
	var out []*entry
	for i--; i >= 0 && (limit <= 0 || len(out) < limit); i-- {
		if e := ix.es[i]; !e.gone {
			out = append(out, e)
		}
	}
	return out
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
