package standing

import (
	"context"
	"fmt"
	"maps"
	"sort"
	"sync"
	"time"
)

// MemoryStore is the in-memory Store of one process (`beliefd serve`
// without Redis) and of tests. Records are kept and returned as copies
// made through JSON, as a networked store keeps them. Leases are timed by
// the now passed to Claim. It is safe for concurrent use.
type MemoryStore struct {
	mu     sync.Mutex
	recs   map[Key]*Record
	seq    map[Key]int64
	next   int64
	leases map[Key]memLease
}

type memLease struct {
	owner   string
	expires time.Time
}

var _ Store = (*MemoryStore)(nil)

// NewMemoryStore returns an empty MemoryStore.
func NewMemoryStore() *MemoryStore {
	return &MemoryStore{recs: map[Key]*Record{}, seq: map[Key]int64{}, leases: map[Key]memLease{}}
}

// Create implements Store.
func (m *MemoryStore) Create(ctx context.Context, rec *Record, max int) error {
	c, err := rec.clone()
	if err != nil {
		return fmt.Errorf("standing store: encode %s: %w", rec.Key, err)
	}
	m.mu.Lock()
	defer m.mu.Unlock()
	if _, ok := m.recs[c.Key]; ok {
		return fmt.Errorf("standing query %q: %w", c.Key.ID, ErrExists)
	}
	if max > 0 && len(m.recs) >= max {
		return fmt.Errorf("%w: %d of %d standing queries are registered", ErrLimit, len(m.recs), max)
	}
	m.recs[c.Key] = c
	m.next++
	m.seq[c.Key] = m.next
	return nil
}

// Get implements Store.
func (m *MemoryStore) Get(ctx context.Context, key Key) (*Record, error) {
	m.mu.Lock()
	defer m.mu.Unlock()
	r, ok := m.recs[key]
	if !ok {
		return nil, notFound(key)
	}
	return r.clone()
}

// List implements Store.
func (m *MemoryStore) List(ctx context.Context) ([]*Record, error) {
	m.mu.Lock()
	defer m.mu.Unlock()
	keys := make([]Key, 0, len(m.recs))
	for k := range m.recs {
		keys = append(keys, k)
	}
	sort.Slice(keys, func(i, j int) bool { return m.seq[keys[i]] < m.seq[keys[j]] })
	out := make([]*Record, 0, len(keys))
	for _, k := range keys {
		c, err := m.recs[k].clone()
		if err != nil {
			return nil, err
		}
		out = append(out, c)
	}
	return out, nil
}

// Delete implements Store.
func (m *MemoryStore) Delete(ctx context.Context, key Key) error {
	m.mu.Lock()
	defer m.mu.Unlock()
	if _, ok := m.recs[key]; !ok {
		return notFound(key)
	}
	delete(m.recs, key)
	delete(m.seq, key)
	delete(m.leases, key)
	return nil
}

// SetEvidence implements Store.
func (m *MemoryStore) SetEvidence(ctx context.Context, key Key, expect int64, ev map[string]string, at time.Time) (*Record, error) {
	m.mu.Lock()
	defer m.mu.Unlock()
	r, ok := m.recs[key]
	if !ok {
		return nil, notFound(key)
	}
	if r.Revision != expect {
		return nil, fmt.Errorf("standing query %q at revision %d, not %d: %w", key.ID, r.Revision, expect, ErrConflict)
	}
	r.Evidence = maps.Clone(ev)
	if r.Evidence == nil {
		r.Evidence = map[string]string{}
	}
	r.Revision = expect + 1
	r.EvidenceAt = at
	return r.clone()
}

// Claim implements Store.
func (m *MemoryStore) Claim(ctx context.Context, key Key, owner string, now time.Time, lease time.Duration) (*Record, error) {
	m.mu.Lock()
	defer m.mu.Unlock()
	r, ok := m.recs[key]
	if !ok {
		return nil, notFound(key)
	}
	if !r.NeedsRecompute(now) {
		return nil, nil
	}
	if l, ok := m.leases[key]; ok && now.Before(l.expires) {
		return nil, nil
	}
	m.leases[key] = memLease{owner: owner, expires: now.Add(lease)}
	return r.clone()
}

// Release implements Store.
func (m *MemoryStore) Release(ctx context.Context, key Key, owner string) error {
	m.mu.Lock()
	defer m.mu.Unlock()
	if l, ok := m.leases[key]; ok && l.owner == owner {
		delete(m.leases, key)
	}
	return nil
}

// Complete implements Store.
func (m *MemoryStore) Complete(ctx context.Context, key Key, owner string, out *Outcome) (bool, error) {
	c, err := (&Record{Result: out}).clone()
	if err != nil {
		return false, fmt.Errorf("standing store: encode outcome of %s: %w", key, err)
	}
	m.mu.Lock()
	defer m.mu.Unlock()
	if l, ok := m.leases[key]; ok && l.owner == owner {
		delete(m.leases, key)
	}
	r, ok := m.recs[key]
	if !ok {
		return false, notFound(key)
	}
	return r.Keep(c.Result), nil
}
