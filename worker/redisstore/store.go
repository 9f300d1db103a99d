package redisstore

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"strings"
	"sync"
	"time"

	"github.com/redis/go-redis/v9"
	"github.com/redis/go-redis/v9/maintnotifications"

	"github.com/beliefd/beliefd/service/jobs"
)

// Defaults of Options.
const (
	DefaultKeyPrefix    = "beliefd"
	DefaultSkewMargin   = 2 * time.Second
	DefaultDialTimeout  = time.Second
	DefaultReadTimeout  = time.Second
	DefaultWriteTimeout = time.Second
	DefaultSweepEvery   = 30 * time.Second
)

// createWindow is how long after its reservation a job's record may still
// be written (doc.go, "Steps across slots").
const createWindow = 5 * time.Second

// Options configure a Store. The zero value is usable: every field has a
// default.
type Options struct {
	// KeyPrefix starts every key and channel name; default "beliefd".
	// Deployments (or tests) sharing one Redis use different prefixes.
	KeyPrefix string
	// SkewMargin is how long past its expiry a lease must be before another
	// worker may claim its block, a margin for clocks that disagree; default 2s.
	// Lease times are read from the Redis server's clock. On a Redis
	// Cluster it also bounds how far the nodes' clocks may disagree.
	SkewMargin time.Duration
	// DialTimeout, ReadTimeout and WriteTimeout bound each network step so
	// that calls fail fast with jobs.ErrUnavailable when Redis is down;
	// default 1s each. Timeouts given in the URL's query take precedence.
	DialTimeout  time.Duration
	ReadTimeout  time.Duration
	WriteTimeout time.Duration
	// Cluster makes New treat its URL as the seed nodes of a Redis Cluster:
	// redis://HOST:PORT?addr=HOST2:PORT2&addr=HOST3:PORT3 (no database).
	Cluster bool
	// SweepEvery is how often the Store checks the indexes against the
	// records and repairs what an interrupted call left half done (doc.go,
	// "Steps across slots"); processes sharing a Redis take turns, so the
	// whole deployment sweeps about once per SweepEvery. Default 30s;
	// negative: never (Sweep may still be called).
	SweepEvery time.Duration
	// Logger receives connection trouble of the notification channel and
	// the sweep's repairs; default slog.Default().
	Logger *slog.Logger

	// createWindow replaces the write window of creations (tests only).
	createWindow time.Duration
}

// Store is the Redis backend of jobs.Store. It is safe for concurrent use.
type Store struct {
	rdb  redis.UniversalClient
	k    keys
	skew time.Duration
	log  *slog.Logger
	hub  *hub
	// window is how long a reserved job's record may still be written;
	// grace is how long the sweep leaves a creation in progress alone:
	// window plus twice the skew margin, for the clocks of two nodes.
	window, grace time.Duration

	// missPrev and missCur hold the complete jobs the previous and the
	// current sweep found without a record (Sweep holds missMu).
	missMu            sync.Mutex
	missPrev, missCur map[string]bool

	quit      chan struct{} // closed by Close: the sweeper stops
	sweepDone chan struct{} // closed when the sweeper has stopped
	closeOnce sync.Once
}

var _ jobs.Store = (*Store)(nil)

// checkOptions validates opt and fills its defaults.
func checkOptions(opt Options) (Options, error) {
	if opt.KeyPrefix == "" {
		opt.KeyPrefix = DefaultKeyPrefix
	}
	if strings.ContainsAny(opt.KeyPrefix, "{}") {
		return opt, fmt.Errorf("redisstore: key prefix %q: braces are reserved for hash tags", opt.KeyPrefix)
	}
	if opt.SkewMargin < 0 {
		return opt, fmt.Errorf("redisstore: skew margin %v is negative", opt.SkewMargin)
	}
	if opt.SkewMargin == 0 {
		opt.SkewMargin = DefaultSkewMargin
	}
	if opt.SweepEvery == 0 {
		opt.SweepEvery = DefaultSweepEvery
	}
	if opt.Logger == nil {
		opt.Logger = slog.Default()
	}
	return opt, nil
}

// New connects to the Redis server at url (redis://[user:password@]HOST:PORT/DB,
// or rediss:// for TLS; go-redis query parameters such as dial_timeout are
// honoured), or with opt.Cluster to the Redis Cluster whose nodes url names
// (redis://HOST:PORT?addr=HOST2:PORT2), and checks that it answers. An
// unreachable server gives an error wrapping jobs.ErrUnavailable.
func New(ctx context.Context, url string, opt Options) (*Store, error) {
	opt, err := checkOptions(opt)
	if err != nil {
		return nil, err
	}
	rdb, addr, err := Dial(url, opt)
	if err != nil {
		return nil, err
	}
	s, err := NewWithClient(ctx, rdb, opt)
	if err != nil {
		return nil, fmt.Errorf("redisstore: connect %s: %w", addr, err)
	}
	return s, nil
}

// Dial makes the client New uses, without connecting: to the server at
// url, or with opt.Cluster to the cluster whose seed nodes url names. Unless
// the URL sets them, the timeouts are opt's (default 1s each) and a call is
// retried once, so that calls fail fast when Redis is down. addr names the
// server or nodes for messages.
func Dial(url string, opt Options) (rdb redis.UniversalClient, addr string, err error) {
	dial, read, write := orDefault(opt.DialTimeout, DefaultDialTimeout), orDefault(opt.ReadTimeout, DefaultReadTimeout), orDefault(opt.WriteTimeout, DefaultWriteTimeout)
	if opt.Cluster {
		co, err := redis.ParseClusterURL(url)
		if err != nil {
			return nil, "", fmt.Errorf("redisstore: cluster url: %w", err)
		}
		fastFail(&co.DialTimeout, &co.ReadTimeout, &co.WriteTimeout, &co.MaxRetries, &co.MaxRetryBackoff, dial, read, write)
		co.DialerRetries = 1
		co.ContextTimeoutEnabled = true
		co.DisableIdentity = true
		co.MaintNotificationsConfig = &maintnotifications.Config{Mode: maintnotifications.ModeDisabled}
		return redis.NewClusterClient(co), strings.Join(co.Addrs, ","), nil
	}
	ro, err := redis.ParseURL(url)
	if err != nil {
		return nil, "", fmt.Errorf("redisstore: url: %w", err)
	}
	fastFail(&ro.DialTimeout, &ro.ReadTimeout, &ro.WriteTimeout, &ro.MaxRetries, &ro.MaxRetryBackoff, dial, read, write)
	ro.DialerRetries = 1
	ro.ContextTimeoutEnabled = true
	ro.DisableIdentity = true
	ro.MaintNotificationsConfig = &maintnotifications.Config{Mode: maintnotifications.ModeDisabled}
	return redis.NewClient(ro), ro.Addr, nil
}

// fastFail fills the timeouts and retries a URL left unset. One retry
// absorbs a pooled connection broken by a server restart; more would only
// delay ErrUnavailable when the server is down.
func fastFail(dialT, readT, writeT *time.Duration, retries *int, backoff *time.Duration, dial, read, write time.Duration) {
	for _, d := range []struct {
		dst *time.Duration
		def time.Duration
	}{{dialT, dial}, {readT, read}, {writeT, write}} {
		if *d.dst == 0 {
			*d.dst = d.def
		}
	}
	if *retries == 0 {
		*retries = 1
	}
	if *backoff == 0 {
		*backoff = 100 * time.Millisecond
	}
}

// NewWithClient returns a Store over rdb, a *redis.Client (one server) or
// a *redis.ClusterClient (Redis Cluster), and checks that it answers.
// The Store owns rdb from then on: Close closes it, and so does a failed
// NewWithClient. The client's own timeouts apply; New sets short ones so
// that calls fail fast when Redis is down.
func NewWithClient(ctx context.Context, rdb redis.UniversalClient, opt Options) (*Store, error) {
	opt, err := checkOptions(opt)
	if err != nil {
		_ = rdb.Close()
		return nil, err
	}
	s := &Store{
		rdb:       rdb,
		k:         keys{p: opt.KeyPrefix},
		skew:      opt.SkewMargin,
		log:       opt.Logger.With("component", "redisstore"),
		window:    orDefault(opt.createWindow, createWindow),
		quit:      make(chan struct{}),
		sweepDone: make(chan struct{}),
	}
	s.grace = s.window + 2*s.skew
	s.hub = newHub(s)
	if err := s.Ping(ctx); err != nil {
		_ = s.rdb.Close()
		return nil, err
	}
	if opt.SweepEvery > 0 {
		go s.sweepLoop(opt.SweepEvery)
	} else {
		close(s.sweepDone)
	}
	return s, nil
}

func orDefault(d, def time.Duration) time.Duration {
	if d > 0 {
		return d
	}
	return def
}

// Ping reports whether Redis answers (readiness): the server, or every
// primary of a cluster.
func (s *Store) Ping(ctx context.Context) error {
	if c, ok := s.rdb.(*redis.ClusterClient); ok {
		return s.fail(ctx, "ping", c.ForEachMaster(ctx, func(ctx context.Context, n *redis.Client) error {
			return n.Ping(ctx).Err()
		}))
	}
	return s.fail(ctx, "ping", s.rdb.Ping(ctx).Err())
}

// Close stops the sweeper, ends every subscription and closes the
// connections.
func (s *Store) Close() error {
	s.closeOnce.Do(func() { close(s.quit) })
	<-s.sweepDone
	s.hub.close()
	if err := s.rdb.Close(); err != nil && !errors.Is(err, redis.ErrClosed) {
		return fmt.Errorf("redisstore: close: %w", err)
	}
	return nil
}

// fail maps an error of a Redis call to the store's errors: nil stays nil;
// once the caller's context has ended its error is what is reported (so
// that a deadline maps to a deadline); replies of the server that mean "not now" (LOADING,
// READONLY, BUSY...) and every network or pool error wrap
// jobs.ErrUnavailable; other server errors are wrapped as they are.
func (s *Store) fail(ctx context.Context, op string, err error) error {
	return failRedis(ctx, "redisstore: "+op, err)
}

// failRedis is fail with the message prefix given whole, for every Redis
// client of the package.
func failRedis(ctx context.Context, prefix string, err error) error {
	if err == nil {
		return nil
	}
	if cerr := ctx.Err(); cerr != nil {
		// The caller gave up (a read deadline taken from ctx shows as an
		// i/o timeout): report the caller's reason.
		if errors.Is(err, cerr) {
			return fmt.Errorf("%s: %w", prefix, err)
		}
		return fmt.Errorf("%s: %w (%v)", prefix, cerr, err)
	}
	var re redis.Error
	if errors.As(err, &re) && !transientReply(re.Error()) {
		return fmt.Errorf("%s: %w", prefix, err)
	}
	return fmt.Errorf("%s: %w: %w", prefix, jobs.ErrUnavailable, err)
}

// transientReply reports whether a server error reply means the server
// cannot serve now but may soon (common practice: these are the replies
// Redis documents for loading, failover, a busy script and cluster changes).
func transientReply(msg string) bool {
	for _, p := range []string{"LOADING", "READONLY", "MASTERDOWN", "BUSY", "CLUSTERDOWN", "TRYAGAIN", "NOREPLICAS"} {
		if strings.HasPrefix(msg, p) {
			return true
		}
	}
	return false
}
