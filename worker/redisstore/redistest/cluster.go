package redistest

import (
	"context"
	"fmt"
	"os"
	"os/exec"
	"strings"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
)

// Bounds on a private cluster's start.
const (
	// clusterCreateTimeout bounds `redis-cli --cluster create`, which
	// assigns the slots and waits for the nodes to meet.
	clusterCreateTimeout = 30 * time.Second
	// clusterReadyTimeout bounds the wait until every node reports the
	// cluster healthy with all slots served.
	clusterReadyTimeout = 15 * time.Second
)

// Cluster is a Redis Cluster of private redis-server processes (primaries
// only, no replicas) on loopback, owned by a test and stopped when it
// ends.
type Cluster struct {
	nodes []*Server
}

// ClusterURL returns the URL of a Redis Cluster for the test, in the form
// redisstore.New takes with Options.Cluster: REDIS_CLUSTER_URL when set
// (shared with other tests: use a key prefix of the test's own), else a
// private cluster of three primaries (StartCluster).
func ClusterURL(t testing.TB) string {
	t.Helper()
	if u := os.Getenv("REDIS_CLUSTER_URL"); u != "" {
		err := pingCluster(u)
		if err == nil {
			return u
		}
		t.Logf("redistest: REDIS_CLUSTER_URL=%s does not answer (%v); starting a private cluster", u, err)
	}
	return StartCluster(t, 3).URL()
}

// pingCluster checks that every primary of the cluster at url answers.
func pingCluster(url string) error {
	opt, err := redis.ParseClusterURL(url)
	if err != nil {
		return err
	}
	opt.DialTimeout, opt.ReadTimeout, opt.MaxRetries, opt.DialerRetries = time.Second, time.Second, -1, 1
	opt.DisableIdentity = true
	c := redis.NewClusterClient(opt)
	defer c.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	return c.ForEachMaster(ctx, func(ctx context.Context, n *redis.Client) error { return n.Ping(ctx).Err() })
}

// StartCluster starts `primaries` redis-server processes (at least 3, as
// redis-cli requires) in cluster mode on free loopback ports, each with
// its own data directory, and joins them with `redis-cli --cluster
// create`, the slots spread evenly. It returns once every node reports
// cluster_state:ok with all 16384 slots assigned; the start is bounded
// (about 45s at most, a second or two as a rule). It skips the test
// (fails it under CI=true) when redis-server or redis-cli is missing.
func StartCluster(t testing.TB, primaries int) *Cluster {
	t.Helper()
	if primaries < 3 {
		t.Fatalf("redistest: a cluster needs at least 3 primaries, not %d", primaries)
	}
	cli := findBinary("redis-cli")
	if cli == "" {
		unavailable(t, "no redis-cli binary in PATH or /usr/bin, /usr/local/bin (it creates the cluster)")
	}
	c := &Cluster{}
	for range primaries {
		c.nodes = append(c.nodes, startServer(t, Options{}, true))
	}
	ctx, cancel := context.WithTimeout(context.Background(), clusterCreateTimeout)
	defer cancel()
	args := append([]string{"--cluster", "create"}, c.Addrs()...)
	args = append(args, "--cluster-replicas", "0", "--cluster-yes")
	out, err := exec.CommandContext(ctx, cli, args...).CombinedOutput()
	if err != nil {
		t.Fatalf("redistest: redis-cli --cluster create: %v\n%s", err, out)
	}
	if err := c.waitReady(); err != nil {
		t.Fatalf("redistest: %v\n%s", err, out)
	}
	return c
}

// waitReady polls CLUSTER INFO on every node until all report the
// cluster healthy with every slot assigned.
func (c *Cluster) waitReady() error {
	deadline := time.Now().Add(clusterReadyTimeout)
	for _, n := range c.nodes {
		rdb := redis.NewClient(&redis.Options{Addr: n.Addr(), DialTimeout: time.Second, ReadTimeout: time.Second,
			MaxRetries: -1, DialerRetries: 1, DisableIdentity: true})
		for {
			ctx, cancel := context.WithTimeout(context.Background(), time.Second)
			info, err := rdb.ClusterInfo(ctx).Result()
			cancel()
			if err == nil && strings.Contains(info, "cluster_state:ok") && strings.Contains(info, "cluster_slots_assigned:16384") &&
				strings.Contains(info, fmt.Sprintf("cluster_known_nodes:%d", len(c.nodes))) {
				break
			}
			if time.Now().After(deadline) {
				rdb.Close()
				return fmt.Errorf("cluster node %s not ready after %v: %v\n%s", n.Addr(), clusterReadyTimeout, err, info)
			}
			time.Sleep(50 * time.Millisecond)
		}
		rdb.Close()
	}
	return nil
}

// Addrs are the nodes' HOST:PORT.
func (c *Cluster) Addrs() []string {
	out := make([]string, len(c.nodes))
	for i, n := range c.nodes {
		out[i] = n.Addr()
	}
	return out
}

// URL names every node: redis://FIRST?addr=SECOND&addr=THIRD...
func (c *Cluster) URL() string {
	addrs := c.Addrs()
	u := "redis://" + addrs[0]
	for i, a := range addrs[1:] {
		sep := "&"
		if i == 0 {
			sep = "?"
		}
		u += sep + "addr=" + a
	}
	return u
}

// Nodes are the cluster's servers.
func (c *Cluster) Nodes() []*Server { return c.nodes }

// Stop stops every node (each is also stopped when the test ends).
func (c *Cluster) Stop() {
	for _, n := range c.nodes {
		n.Stop()
	}
}
