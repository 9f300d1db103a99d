package redisstore

import (
	"context"
	"fmt"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"

	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/jobstest"
	"github.com/beliefd/beliefd/worker/redisstore/redistest"
)

// The tests below run on a Redis Cluster of three primaries on loopback
// (redistest.ClusterURL), where a script touching keys of two slots fails
// with CROSSSLOT and a key of another node is refused: every operation
// of the Store must keep to one slot per script.

// TestConformanceCluster runs the suite every jobs.Store backend passes on
// a Redis Cluster.
func TestConformanceCluster(t *testing.T) {
	start := time.Now()
	url := redistest.ClusterURL(t)
	t.Logf("cluster of 3 primaries ready in %v", time.Since(start).Round(time.Millisecond))
	start = time.Now()
	jobstest.Run(t, func(t *testing.T) jobs.Store {
		return newStore(t, url, Options{Cluster: true})
	})
	t.Logf("conformance suite on the cluster: %v", time.Since(start).Round(time.Millisecond))
}

// TestServiceOverRedisCluster runs a sampling job through API and worker
// services on a Redis Cluster: the result equals infer.Runner's, bit for
// bit.
func TestServiceOverRedisCluster(t *testing.T) {
	serviceOverRedis(t, redistest.ClusterURL(t), true)
}

// TestClusterSpread checks that the cluster test is not trivially on one
// node: job records spread over the primaries while the indexes stay on
// the one that serves {global}, and the sweep works across them.
func TestClusterSpread(t *testing.T) {
	url := redistest.ClusterURL(t)
	s := newStore(t, url, Options{Cluster: true, SweepEvery: -1})
	ctx := ctxFor(t)
	for i := range 30 {
		j := testJob(fmt.Sprint("J", i))
		j.Tenant = fmt.Sprint("t", i%3)
		j.IdempotencyKey = fmt.Sprint("k", i)
		create(t, s, j)
		if i%2 == 0 {
			setState(t, s, j.ID, jobs.StateSucceeded)
		}
	}
	c := s.rdb.(*redis.ClusterClient)
	nodes := map[string]bool{}
	for i := range 30 {
		n, err := c.MasterForKey(ctx, s.k.job(fmt.Sprint("J", i)).rec)
		if err != nil {
			t.Fatal(err)
		}
		nodes[n.Options().Addr] = true
	}
	if len(nodes) < 2 {
		t.Fatalf("30 job records on %d primary; want them spread over several", len(nodes))
	}
	if q, r, err := s.Unfinished(ctx); err != nil || q != 15 || r != 0 {
		t.Fatalf("Unfinished = %d, %d, %v; want 15, 0", q, r, err)
	}
	if js, err := s.ListJobs(ctx, "t1", "", 0); err != nil || len(js) != 10 {
		t.Fatalf("ListJobs(t1) = %d jobs, %v; want 10", len(js), err)
	}
	if rep, err := s.Sweep(ctx); err != nil || rep.Repairs() != 0 {
		t.Fatalf("Sweep = %+v, %v; want nothing to repair", rep, err)
	}
	// Readiness covers every primary.
	pctx, cancel := context.WithTimeout(ctx, 5*time.Second)
	defer cancel()
	if err := s.Ping(pctx); err != nil {
		t.Fatal(err)
	}
	t.Logf("job records on %d of 3 primaries", len(nodes))
}
