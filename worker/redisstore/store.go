package redisstore

import (
	"context"
	"errors"
	"fmt"
	"log/slog"
	"strings"
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
)

// Options configure a Store. The zero value is usable: every field has a
// default.
type Options struct {
	// KeyPrefix starts every key and channel name; default "beliefd".
	// Deployments (or tests) sharing one Redis use different prefixes.
	KeyPrefix string
	// SkewMargin is how long past its expiry a lease must be before another
	// worker may claim its block, a margin for clocks that disagree; default 2s.
	// Lease times are read from the Redis server's clock.
	SkewMargin time.Duration
	// DialTimeout, ReadTimeout and WriteTimeout bound each network step so
	// that calls fail fast with jobs.ErrUnavailable when Redis is down;
	// default 1s each. Timeouts given in the URL's query take precedence.
	DialTimeout  time.Duration
	ReadTimeout  time.Duration
	WriteTimeout time.Duration
	// Logger receives connection trouble of the notification channel;
	// default slog.Default().
	Logger *slog.Logger
}

// Store is the Redis backend of jobs.Store. It is safe for concurrent use.
type Store struct {
	rdb  *redis.Client
	k    keys
	skew time.Duration
	log  *slog.Logger
	hub  *hub
}

var _ jobs.Store = (*Store)(nil)

// New connects to the Redis server at url (redis://[user:password@]HOST:PORT/DB,
// or rediss:// for TLS; go-redis query parameters such as dial_timeout are
// honoured) and checks that it answers. An unreachable server gives an error
// wrapping jobs.ErrUnavailable.
func New(ctx context.Context, url string, opt Options) (*Store, error) {
	ro, err := redis.ParseURL(url)
	if err != nil {
		return nil, fmt.Errorf("redisstore: url: %w", err)
	}
	if opt.KeyPrefix == "" {
		opt.KeyPrefix = DefaultKeyPrefix
	}
	if strings.ContainsAny(opt.KeyPrefix, "{}") {
		return nil, fmt.Errorf("redisstore: key prefix %q: braces are reserved for hash tags", opt.KeyPrefix)
	}
	if opt.SkewMargin < 0 {
		return nil, fmt.Errorf("redisstore: skew margin %v is negative", opt.SkewMargin)
	}
	if opt.SkewMargin == 0 {
		opt.SkewMargin = DefaultSkewMargin
	}
	if opt.Logger == nil {
		opt.Logger = slog.Default()
	}
	if ro.DialTimeout == 0 {
		ro.DialTimeout = orDefault(opt.DialTimeout, DefaultDialTimeout)
	}
	if ro.ReadTimeout == 0 {
		ro.ReadTimeout = orDefault(opt.ReadTimeout, DefaultReadTimeout)
	}
	if ro.WriteTimeout == 0 {
		ro.WriteTimeout = orDefault(opt.WriteTimeout, DefaultWriteTimeout)
	}
	if ro.MaxRetries == 0 {
		// One retry absorbs a pooled connection broken by a server restart;
		// more would only delay ErrUnavailable when the server is down.
		ro.MaxRetries = 1
	}
	if ro.MaxRetryBackoff == 0 {
		ro.MaxRetryBackoff = 100 * time.Millisecond
	}
	ro.DialerRetries = 1
	ro.ContextTimeoutEnabled = true
	ro.DisableIdentity = true
	ro.MaintNotificationsConfig = &maintnotifications.Config{Mode: maintnotifications.ModeDisabled}

	s := &Store{
		rdb:  redis.NewClient(ro),
		k:    keys{p: opt.KeyPrefix},
		skew: opt.SkewMargin,
		log:  opt.Logger.With("component", "redisstore"),
	}
	s.hub = newHub(s)
	if err := s.Ping(ctx); err != nil {
		_ = s.rdb.Close()
		return nil, fmt.Errorf("redisstore: connect %s: %w", ro.Addr, err)
	}
	return s, nil
}

func orDefault(d, def time.Duration) time.Duration {
	if d > 0 {
		return d
	}
	return def
}

// Ping reports whether Redis answers (readiness).
func (s *Store) Ping(ctx context.Context) error {
	return s.fail(ctx, "ping", s.rdb.Ping(ctx).Err())
}

// Close ends every subscription and closes the connections.
func (s *Store) Close() error {
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
	if err == nil {
		return nil
	}
	if cerr := ctx.Err(); cerr != nil {
		// The caller gave up (a read deadline taken from ctx shows as an
		// i/o timeout): report the caller's reason.
		if errors.Is(err, cerr) {
			return fmt.Errorf("redisstore: %s: %w", op, err)
		}
		return fmt.Errorf("redisstore: %s: %w (%v)", op, cerr, err)
	}
	var re redis.Error
	if errors.As(err, &re) && !transientReply(re.Error()) {
		return fmt.Errorf("redisstore: %s: %w", op, err)
	}
	return fmt.Errorf("redisstore: %s: %w: %w", op, jobs.ErrUnavailable, err)
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
