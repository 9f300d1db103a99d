package main

import (
	"context"
	"crypto/tls"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"os"
	"text/tabwriter"

	"github.com/redis/go-redis/v9"

	"github.com/beliefd/beliefd/api/auth"
	beliefv1 "github.com/beliefd/beliefd/proto/belief/v1"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/worker/redisstore"
)

// tenantsSource reads the tenants document from where the settings say.
type tenantsSource struct {
	where string // for messages: the flag and its value
	fetch func(ctx context.Context) ([]byte, error)
	close func() error
}

// openTenants reads the configured tenants document and returns the
// registry and its source, or nil and nil when none is configured (the
// API is open). A document that cannot be read or is invalid, or that has
// no tokens, stops the start with an error naming the setting.
func openTenants(ctx context.Context, cfg *serverConfig) (*auth.Registry, *tenantsSource, error) {
	var src *tenantsSource
	switch {
	case cfg.TenantsFile != "":
		path := cfg.TenantsFile
		src = &tenantsSource{
			where: fmt.Sprintf("--tenants-file %s", path),
			fetch: func(context.Context) ([]byte, error) {
				b, err := os.ReadFile(path)
				if err != nil {
					return nil, fmt.Errorf("read tenants document: %w", err)
				}
				return b, nil
			},
			close: func() error { return nil },
		}
	case cfg.TenantsRedisKey != "":
		rdb, _, err := redisstore.Dial(cfg.Redis, redisstore.Options{Cluster: cfg.RedisCluster})
		if err != nil {
			return nil, nil, fmt.Errorf("%w: --redis %q: %v", errUsage, redactURL(cfg.Redis), err)
		}
		key := cfg.TenantsRedisKey
		src = &tenantsSource{
			where: fmt.Sprintf("--tenants-redis-key %s", key),
			fetch: func(ctx context.Context) ([]byte, error) {
				b, err := rdb.Get(ctx, key).Bytes()
				if errors.Is(err, redis.Nil) {
					return nil, fmt.Errorf("redis key %q does not exist (store the tenants document there with SET)", key)
				}
				if err != nil {
					return nil, fmt.Errorf("read redis key %q: %w", key, err)
				}
				return b, nil
			},
			close: rdb.Close,
		}
	default:
		return nil, nil, nil
	}
	data, err := src.fetch(ctx)
	if err == nil {
		var reg *auth.Registry
		if reg, err = auth.NewRegistry(data); err == nil {
			if reg.Tokens() == 0 {
				err = errors.New("the document lists no tokens, so no caller could be served (mint one with 'beliefd token')")
			} else {
				return reg, src, nil
			}
		}
	}
	src.close()
	return nil, nil, fmt.Errorf("%s: %w", src.where, err)
}

// loadServerTLS reads --tls-cert and --tls-key; nil when not given.
func loadServerTLS(cfg *serverConfig) (*tls.Config, error) {
	if cfg.TLSCert == "" {
		return nil, nil
	}
	cert, err := tls.LoadX509KeyPair(cfg.TLSCert, cfg.TLSKey)
	if err != nil {
		return nil, fmt.Errorf("--tls-cert %s, --tls-key %s: %w", cfg.TLSCert, cfg.TLSKey, err)
	}
	return &tls.Config{Certificates: []tls.Certificate{cert}, MinVersion: tls.VersionTLS12}, nil
}

// logAccess says at start who may call the API.
func logAccess(log *slog.Logger, cfg *serverConfig, reg *auth.Registry, src *tenantsSource, tlsOn bool) {
	switch {
	case reg == nil && cfg.AllowOpenAccess && !(loopbackAddr(cfg.HTTPAddr) && loopbackAddr(cfg.GRPCAddr)):
		log.Warn("no tokens configured and --allow-open-access given: the API is OPEN to every caller that can reach it, as the open tenant \"\" with the admin role",
			"http_addr", cfg.HTTPAddr, "grpc_addr", cfg.GRPCAddr)
	case reg == nil:
		log.Info("no tokens configured: the API is open on loopback; every caller is the open tenant \"\" with the admin role (--tenants-file or --tenants-redis-key to require tokens)")
	default:
		log.Info("tokens required", "source", src.where, "tenants", len(reg.Tenants()), "tokens", reg.Tokens(), "reload_every", cfg.TenantsReload)
		if !tlsOn && !(loopbackAddr(cfg.HTTPAddr) && loopbackAddr(cfg.GRPCAddr)) {
			log.Warn("tokens are required but TLS is off: tokens cross the network in the clear unless a proxy in front terminates TLS (--tls-cert and --tls-key)")
		}
	}
}

// tokenEntryLine is the entry of a minted token, as the tenants document holds it.
func tokenEntryLine(e auth.TokenEntry) string {
	b, _ := json.Marshal(e)
	return string(b)
}

func cmdToken(_ context.Context, args []string, stdout, _ io.Writer) error {
	fs := newFlagSet("token", "token --tenant NAME [--role member|admin|metrics] [--label TEXT]", stdout)
	tenant := fs.String("tenant", "", "tenant the token belongs to (listed under \"tenants\" in the tenants document)")
	role := fs.String("role", auth.RoleMember, "member (the tenant's own models and jobs), admin (every tenant's, and the admin endpoints) or metrics (reads /metrics only, for a Prometheus that scrapes with --metrics-need-token)")
	label := fs.String("label", "", "names the token in logs, such as the team or pipeline that uses it")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if fs.NArg() > 0 {
		return fmt.Errorf("%w: unexpected argument %q", errUsage, fs.Arg(0))
	}
	if *tenant == "" {
		return fmt.Errorf("%w: give --tenant NAME", errUsage)
	}
	if err := jobs.CheckTenantName(*tenant); err != nil {
		return fmt.Errorf("%w: --tenant: %v", errUsage, err)
	}
	if *role != auth.RoleMember && *role != auth.RoleAdmin && *role != auth.RoleMetrics {
		return fmt.Errorf("%w: --role %q: want %s, %s or %s", errUsage, *role, auth.RoleMember, auth.RoleAdmin, auth.RoleMetrics)
	}
	tok, err := auth.NewToken()
	if err != nil {
		return err
	}
	entry := auth.TokenEntry{Label: *label, Tenant: *tenant, Role: *role, SHA256: auth.HashToken(tok)}
	fmt.Fprintf(stdout, "token (shown this once; the server keeps only its hash; give it to the caller, e.g. as BELIEFD_TOKEN):\n\n  %s\n\n", tok)
	fmt.Fprintf(stdout, "add this entry to \"tokens\" in the tenants document (and %q to \"tenants\" if it is not there):\n\n  %s\n", *tenant, tokenEntryLine(entry))
	return nil
}

func cmdTenants(ctx context.Context, args []string, stdout, _ io.Writer) error {
	fs := newFlagSet("tenants", "tenants [--server ADDR] [--token T]", stdout)
	ep := endpointFlags(fs)
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if fs.NArg() > 0 {
		return fmt.Errorf("%w: unexpected argument %q", errUsage, fs.Arg(0))
	}
	c, err := ep.dial()
	if err != nil {
		return err
	}
	defer c.conn.Close()
	resp, err := beliefv1.NewAdminServiceClient(c.conn).ListTenantUsage(ctx, &beliefv1.ListTenantUsageRequest{})
	if err != nil {
		return rpcError(*ep.server, err)
	}
	limit := func(n int64) string {
		if n <= 0 {
			return "-"
		}
		return groupDigits(float64(n))
	}
	tw := tabwriter.NewWriter(stdout, 2, 4, 2, ' ', 0)
	fmt.Fprintln(tw, "tenant\tqueued\trunning\tmax unfinished\tmax samples/job\tmax model bytes\tshare")
	for _, u := range resp.GetTenants() {
		name := u.GetTenant()
		if name == "" {
			name = `"" (open)`
		}
		fmt.Fprintf(tw, "%s\t%d\t%d\t%s\t%s\t%s\t%g\n", name, u.GetQueued(), u.GetRunning(),
			limit(u.GetMaxUnfinished()), limit(u.GetMaxSamplesPerJob()), limit(u.GetMaxModelBytes()), u.GetShare())
	}
	return tw.Flush()
}
