package jobs

import (
	"sync"
	"time"
)

// Fair scheduling between tenants.
//
// RunOnce chooses whose work to claim next with a fairQueue: stride
// scheduling (Waldspurger and Weihl, "Stride Scheduling: Deterministic
// Proportional-Share Resource Management", MIT/LCS/TM-528, 1995) with the
// worker time of a unit as its cost. Each tenant has a virtual time, its
// pass: the worker time its units have taken, divided by its share
// (TenantPolicy.EffectiveShare). Among the tenants with claimable work,
// the one with the smallest pass goes first (ties in tenant name order);
// within a tenant, jobs go in the store's order, highest priority first,
// then oldest. So while several tenants have work, each gets worker time
// in proportion to its share, whatever the number or size of its jobs,
// and a tenant's small job waits for a bounded number of other tenants'
// units instead of for their whole backlog.
//
// A unit's duration is known only when it ends, yet many goroutines pick
// at once. A pick therefore charges the tenant's expected unit time at
// once (a moving average of its units, or of all units for a tenant not
// seen yet), and the unit's end corrects the charge to the time it took;
// a pick that finds no unit to claim is refunded.
//
// A tenant that comes (back) with work starts at the smallest pass among
// the tenants with work, so it gets no credit for the time it was idle
// and owes nothing for it. A tenant that was served ahead of the others
// keeps its pass while idle, so going idle briefly does not reset a debt.
//
// Each Service keeps its own queue: processes sharing a store are fair
// each on its own, so all of them together are fair too, as long as they
// see the same claimable jobs.

// fairAlpha is the weight of the newest unit in a tenant's moving average
// of unit durations.
const fairAlpha = 0.2

// fairNominal is the expected unit time before any unit has been timed.
const fairNominal = time.Millisecond

// fairQueue holds the virtual times of the tenants. It is safe for
// concurrent use.
type fairQueue struct {
	share func(tenant string) float64

	mu    sync.Mutex
	ts    map[string]*fairTenant
	vtime float64 // smallest pass among the tenants with work at the last pick
	avg   float64 // moving average of all units' durations, seconds
	timed bool    // avg has been measured
}

// fairTenant is a tenant's state.
type fairTenant struct {
	pass float64 // worker seconds received / share, with the charges of picks under way
	// inflight is the part of pass charged by picks not settled yet; pass
	// - inflight, the settled pass, only grows while the tenant is known.
	inflight float64
	avg      float64 // moving average of its units' durations, seconds; 0: none timed
}

// settled is the pass without the charges of picks under way.
func (t *fairTenant) settled() float64 { return t.pass - t.inflight }

// fairGroup is one tenant's claimable jobs in the store's order.
type fairGroup struct {
	tenant string
	jobs   []Claimable
}

// fairTicket is what a pick charged.
type fairTicket struct {
	tenant  string
	charged float64 // virtual time charged (seconds / share)
	share   float64
}

func newFairQueue(share func(tenant string) float64) *fairQueue {
	return &fairQueue{share: share, ts: map[string]*fairTenant{}, avg: fairNominal.Seconds()}
}

// round starts a round of picks over the claimable jobs: it groups them by
// tenant (keeping the store's order within a tenant), enters tenants that
// came with work at the smallest pass, and forgets idle tenants whose pass
// the others have caught up with. It returns the groups; pick chooses
// among them.
func (q *fairQueue) round(cands []Claimable) []fairGroup {
	var groups []fairGroup
	at := map[string]int{}
	for _, c := range cands {
		i, ok := at[c.Tenant]
		if !ok {
			i = len(groups)
			at[c.Tenant] = i
			groups = append(groups, fairGroup{tenant: c.Tenant})
		}
		groups[i].jobs = append(groups[i].jobs, c)
	}
	q.mu.Lock()
	defer q.mu.Unlock()
	// The virtual time follows settled passes: a charge that is later
	// refunded must not carry it past a tenant that never went idle.
	v, seen := 0.0, false
	for _, g := range groups {
		if t, ok := q.ts[g.tenant]; ok && (!seen || t.settled() < v) {
			v, seen = t.settled(), true
		}
	}
	if !seen {
		v = q.vtime
	}
	q.vtime = max(q.vtime, v)
	for _, g := range groups {
		t, ok := q.ts[g.tenant]
		if !ok {
			q.ts[g.tenant] = &fairTenant{pass: q.vtime}
		} else if t.settled() < q.vtime {
			t.pass += q.vtime - t.settled()
		}
	}
	for name, t := range q.ts {
		if _, active := at[name]; !active && t.inflight == 0 && t.pass <= q.vtime {
			delete(q.ts, name)
		}
	}
	return groups
}

// pick chooses the group with the smallest pass among those not tried
// yet (ties in tenant name order) and charges its tenant the expected
// time of a unit. It returns -1 when every group has been tried.
func (q *fairQueue) pick(groups []fairGroup, tried []bool) (int, fairTicket) {
	q.mu.Lock()
	defer q.mu.Unlock()
	best := -1
	var bestPass float64
	for i, g := range groups {
		if tried[i] {
			continue
		}
		t := q.tenant(g.tenant)
		if best < 0 || t.pass < bestPass || t.pass == bestPass && g.tenant < groups[best].tenant {
			best, bestPass = i, t.pass
		}
	}
	if best < 0 {
		return -1, fairTicket{}
	}
	name := groups[best].tenant
	t := q.tenant(name)
	share := q.share(name)
	expect := t.avg
	if expect == 0 {
		expect = q.avg
	}
	tk := fairTicket{tenant: name, charged: expect / share, share: share}
	t.pass += tk.charged
	t.inflight += tk.charged
	return best, tk
}

// tenant returns the state of a tenant, entering it at the virtual time
// when it is not known (it was forgotten while a pick was under way).
// Callers hold mu.
func (q *fairQueue) tenant(name string) *fairTenant {
	t, ok := q.ts[name]
	if !ok {
		t = &fairTenant{pass: q.vtime}
		q.ts[name] = t
	}
	return t
}

// done settles a pick: a pick that ran no unit is refunded; one that ran
// a unit for d is charged d instead of the expected time, and d enters
// the moving averages.
func (q *fairQueue) done(tk fairTicket, worked bool, d time.Duration) {
	q.mu.Lock()
	defer q.mu.Unlock()
	t, ok := q.ts[tk.tenant]
	if ok {
		t.inflight -= tk.charged
		if t.inflight < 1e-12 {
			t.inflight = 0 // rounding of many charges and refunds
		}
	}
	if !worked {
		if ok {
			t.pass -= tk.charged
		}
		return
	}
	sec := max(d.Seconds(), 0)
	if ok {
		t.pass += sec/tk.share - tk.charged
		if t.avg == 0 {
			t.avg = sec
		} else {
			t.avg += fairAlpha * (sec - t.avg)
		}
	}
	if !q.timed {
		q.avg, q.timed = sec, true
	} else {
		q.avg += fairAlpha * (sec - q.avg)
	}
}

// shareOf is a tenant's scheduling share (1 when no policy is configured).
func (s *Service) shareOf(tenant string) float64 {
	if s.cfg.TenantPolicy == nil {
		return 1
	}
	return s.cfg.TenantPolicy(tenant).EffectiveShare()
}
