package main

import (
	"errors"
	"flag"
	"fmt"
	"log/slog"
	"net"
	"net/url"
	"os"
	"runtime"
	"strings"
	"time"
)

// serverConfig configures `beliefd serve` and `beliefd worker`. Every field
// has a flag and a BELIEFD_* environment variable (the flag wins); zero
// values take the defaults documented on the flags.
type serverConfig struct {
	HTTPAddr        string        // --http-addr, BELIEFD_HTTP_ADDR
	GRPCAddr        string        // --grpc-addr, BELIEFD_GRPC_ADDR
	MetricsAddr     string        // --metrics-addr, BELIEFD_METRICS_ADDR (worker only)
	Redis           string        // --redis, BELIEFD_REDIS; empty: embedded memory backend
	RedisCluster    bool          // --redis-cluster, BELIEFD_REDIS_CLUSTER: --redis names the seed nodes of a Redis Cluster
	Workers         int           // --workers, BELIEFD_WORKERS
	Preload         bool          // --preload, BELIEFD_PRELOAD
	MaxUnfinished   int           // --max-jobs, BELIEFD_MAX_JOBS
	MaxStanding     int           // --max-standing-queries, BELIEFD_MAX_STANDING_QUERIES (serve only)
	Retention       time.Duration // --retention, BELIEFD_RETENTION
	MaxJobTime      time.Duration // --max-job-time, BELIEFD_MAX_JOB_TIME
	ShutdownTimeout time.Duration // --shutdown-timeout, BELIEFD_SHUTDOWN_TIMEOUT
	LeaseTime       time.Duration // --lease-time, BELIEFD_LEASE_TIME
	MaxBodyBytes    int64         // --max-body-bytes, BELIEFD_MAX_BODY_BYTES
	ExactLimit      int           // --exact-limit, BELIEFD_EXACT_LIMIT
	LogFormat       string        // --log-format, BELIEFD_LOG_FORMAT: text or json
	LogLevel        string        // --log-level, BELIEFD_LOG_LEVEL: debug, info, warn, error

	// Tenants and tokens (api/auth): from a file or a Redis key, re-read
	// every TenantsReload; neither leaves the API open.
	TenantsFile     string        // --tenants-file, BELIEFD_TENANTS_FILE
	TenantsRedisKey string        // --tenants-redis-key, BELIEFD_TENANTS_REDIS_KEY (on --redis)
	TenantsReload   time.Duration // --tenants-reload, BELIEFD_TENANTS_RELOAD
	AllowOpenAccess bool          // --allow-open-access, BELIEFD_ALLOW_OPEN_ACCESS (serve only)
	MetricsToken    bool          // --metrics-need-token, BELIEFD_METRICS_NEED_TOKEN (serve only)
	TLSCert         string        // --tls-cert, BELIEFD_TLS_CERT (serve only)
	TLSKey          string        // --tls-key, BELIEFD_TLS_KEY (serve only)
}

// bindServerFlags registers the flags of cfg on fs. api selects the flags
// of the API process (serve) as opposed to the worker process.
func bindServerFlags(fs *flag.FlagSet, cfg *serverConfig, api bool) {
	if api {
		fs.StringVar(&cfg.HTTPAddr, "http-addr", "127.0.0.1:8080", "HTTP listen address (JSON API, events, metrics, health); ':8080' for every interface")
		fs.StringVar(&cfg.GRPCAddr, "grpc-addr", "127.0.0.1:9090", "gRPC listen address; ':9090' for every interface")
		fs.BoolVar(&cfg.AllowOpenAccess, "allow-open-access", false, "serve a non-loopback address without tokens: every caller is the open tenant with the admin role")
		fs.BoolVar(&cfg.MetricsToken, "metrics-need-token", false, "/metrics needs a token with the metrics or admin role (its standing-query gauges carry every tenant's posteriors); needs a tenants document")
		fs.StringVar(&cfg.TLSCert, "tls-cert", "", "PEM certificate (chain) file: serve HTTPS and gRPC over TLS (with --tls-key)")
		fs.StringVar(&cfg.TLSKey, "tls-key", "", "PEM private key file of --tls-cert")
		fs.IntVar(&cfg.MaxStanding, "max-standing-queries", 100, "standing queries allowed (all tenants); each adds gauges to /metrics")
		fs.BoolVar(&cfg.Preload, "preload", true, "load the example models at start when the store has none of that name")
		fs.Int64Var(&cfg.MaxBodyBytes, "max-body-bytes", 64<<20, "largest model document accepted over HTTP (JSON) or gRPC (message); queries are limited to 1 MiB")
		fs.DurationVar(&cfg.ShutdownTimeout, "shutdown-timeout", 20*time.Second, "how long SIGTERM waits for requests and blocks in flight")
	} else {
		fs.StringVar(&cfg.MetricsAddr, "metrics-addr", ":8081", "address serving /metrics, /healthz and /readyz (empty: none)")
		fs.DurationVar(&cfg.ShutdownTimeout, "shutdown-timeout", 20*time.Second, "how long SIGTERM waits for blocks in flight")
	}
	fs.StringVar(&cfg.Redis, "redis", "", "Redis URL redis://HOST:PORT/DB; empty runs on the embedded in-memory store")
	fs.BoolVar(&cfg.RedisCluster, "redis-cluster", false, "--redis names seed nodes of a Redis Cluster: redis://HOST:PORT?addr=HOST2:PORT2&addr=HOST3:PORT3")
	fs.IntVar(&cfg.Workers, "workers", runtime.GOMAXPROCS(0), "sampling goroutines in this process (0: API only)")
	fs.IntVar(&cfg.MaxUnfinished, "max-jobs", 1000, "queued and running jobs allowed before submissions are refused (429)")
	fs.DurationVar(&cfg.Retention, "retention", 24*time.Hour, "how long finished jobs are kept")
	fs.DurationVar(&cfg.MaxJobTime, "max-job-time", 10*time.Minute, "deadline of a job whose query gives no timeout")
	fs.DurationVar(&cfg.LeaseTime, "lease-time", 15*time.Second, "lease on a block of samples; a worker renews it every third of it, and a block whose worker stops is taken up by another after the lease (plus a 2s clock margin)")
	fs.IntVar(&cfg.ExactLimit, "exact-limit", 0, "largest junction tree (total table entries) exact inference may build (default 50,000,000)")
	fs.StringVar(&cfg.TenantsFile, "tenants-file", "", "tenants document (JSON: tenants with quotas, hashes of tokens); without it or --tenants-redis-key the API is open")
	fs.StringVar(&cfg.TenantsRedisKey, "tenants-redis-key", "", "Redis key (on --redis) holding the tenants document, instead of --tenants-file")
	fs.DurationVar(&cfg.TenantsReload, "tenants-reload", 10*time.Second, "how often the tenants document is read again")
	fs.StringVar(&cfg.LogFormat, "log-format", "text", "log format: text or json")
	fs.StringVar(&cfg.LogLevel, "log-level", "info", "log level: debug, info, warn or error")
}

// applyEnv sets every flag not given on the command line from its
// BELIEFD_* environment variable (--http-addr <- BELIEFD_HTTP_ADDR).
func applyEnv(fs *flag.FlagSet, lookup func(string) (string, bool)) error {
	given := map[string]bool{}
	fs.Visit(func(f *flag.Flag) { given[f.Name] = true })
	var errs []error
	fs.VisitAll(func(f *flag.Flag) {
		if given[f.Name] {
			return
		}
		env := "BELIEFD_" + strings.ToUpper(strings.ReplaceAll(f.Name, "-", "_"))
		if v, ok := lookup(env); ok {
			if err := fs.Set(f.Name, v); err != nil {
				errs = append(errs, fmt.Errorf("%s=%q: %v", env, v, err))
			}
		}
	})
	if len(errs) > 0 {
		return fmt.Errorf("%w: %w", errUsage, errors.Join(errs...))
	}
	return nil
}

// Validate names the setting at fault.
func (c *serverConfig) Validate(api bool) error {
	bad := func(format string, a ...any) error {
		return fmt.Errorf("%w: "+format, append([]any{errUsage}, a...)...)
	}
	if api {
		for _, a := range []struct{ name, v string }{{"--http-addr", c.HTTPAddr}, {"--grpc-addr", c.GRPCAddr}} {
			if _, _, err := net.SplitHostPort(a.v); err != nil {
				return bad("%s %q: want HOST:PORT or :PORT", a.name, a.v)
			}
		}
		if c.MaxBodyBytes < 1024 || c.MaxBodyBytes > 1<<30 {
			return bad("--max-body-bytes %d: want 1024 to 1073741824", c.MaxBodyBytes)
		}
		if (c.TLSCert == "") != (c.TLSKey == "") {
			return bad("--tls-cert and --tls-key go together: give both or neither")
		}
		if c.MetricsToken && !c.tenantsConfigured() {
			return bad("--metrics-need-token needs a tenants document (--tenants-file or --tenants-redis-key)")
		}
		if !c.tenantsConfigured() && !c.AllowOpenAccess {
			for _, a := range []struct{ name, v string }{{"--http-addr", c.HTTPAddr}, {"--grpc-addr", c.GRPCAddr}} {
				if !loopbackAddr(a.v) {
					return bad("%s %s is not a loopback address and no tokens are configured: give --tenants-file or --tenants-redis-key, or --allow-open-access to serve every caller without a token", a.name, a.v)
				}
			}
		}
	} else {
		if c.Redis == "" {
			return bad("--redis is required: a worker process takes its work from Redis (or run 'beliefd serve', which has its own workers)")
		}
		if c.MetricsAddr != "" {
			if _, _, err := net.SplitHostPort(c.MetricsAddr); err != nil {
				return bad("--metrics-addr %q: want HOST:PORT or :PORT", c.MetricsAddr)
			}
		}
		if c.Workers < 1 {
			return bad("--workers %d: a worker process needs at least 1", c.Workers)
		}
	}
	if c.TenantsFile != "" && c.TenantsRedisKey != "" {
		return bad("give --tenants-file or --tenants-redis-key, not both")
	}
	if c.TenantsRedisKey != "" && c.Redis == "" {
		return bad("--tenants-redis-key %q needs --redis", c.TenantsRedisKey)
	}
	if c.TenantsReload < time.Second {
		return bad("--tenants-reload %s: want at least 1s", c.TenantsReload)
	}
	if c.RedisCluster && c.Redis == "" {
		return bad("--redis-cluster needs --redis (the seed nodes of the cluster)")
	}
	if c.Redis != "" {
		u, err := url.Parse(c.Redis)
		if err != nil || (u.Scheme != "redis" && u.Scheme != "rediss") || u.Host == "" {
			return bad("--redis %q: want redis://HOST:PORT/DB", c.Redis)
		}
	}
	switch {
	case c.Workers < 0:
		return bad("--workers %d: want 0 or more", c.Workers)
	case c.MaxUnfinished < 1:
		return bad("--max-jobs %d: want at least 1", c.MaxUnfinished)
	case api && (c.MaxStanding < 1 || c.MaxStanding > 10000):
		return bad("--max-standing-queries %d: want 1 to 10000", c.MaxStanding)
	case c.Retention < time.Second:
		return bad("--retention %s: want at least 1s", c.Retention)
	case c.MaxJobTime < time.Second:
		return bad("--max-job-time %s: want at least 1s", c.MaxJobTime)
	case c.LeaseTime < 100*time.Millisecond:
		return bad("--lease-time %s: want at least 100ms", c.LeaseTime)
	case c.ShutdownTimeout < 0:
		return bad("--shutdown-timeout %s: want 0 or more", c.ShutdownTimeout)
	case c.ExactLimit < 0:
		return bad("--exact-limit %d: want 0 (default) or more", c.ExactLimit)
	}
	if _, err := c.logger(os.Stderr); err != nil {
		return err
	}
	return nil
}

// tenantsConfigured reports whether a tenants document is configured.
func (c *serverConfig) tenantsConfigured() bool {
	return c.TenantsFile != "" || c.TenantsRedisKey != ""
}

// loopbackAddr reports whether a listen address HOST:PORT binds a
// loopback address only (an empty host binds every interface).
func loopbackAddr(addr string) bool {
	host, _, err := net.SplitHostPort(addr)
	if err != nil {
		return false
	}
	if host == "localhost" {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

func (c *serverConfig) logger(w *os.File) (*slog.Logger, error) {
	var level slog.Level
	if err := level.UnmarshalText([]byte(c.LogLevel)); err != nil {
		return nil, fmt.Errorf("%w: --log-level %q: want debug, info, warn or error", errUsage, c.LogLevel)
	}
	opts := &slog.HandlerOptions{Level: level}
	switch c.LogFormat {
	case "text":
		return slog.New(slog.NewTextHandler(w, opts)), nil
	case "json":
		return slog.New(slog.NewJSONHandler(w, opts)), nil
	}
	return nil, fmt.Errorf("%w: --log-format %q: want text or json", errUsage, c.LogFormat)
}
