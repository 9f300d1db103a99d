package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"net"
	"net/http"
	"os"
	"strings"
	"sync"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"google.golang.org/grpc"
	"google.golang.org/grpc/credentials"

	"github.com/beliefd/beliefd/api/auth"
	"github.com/beliefd/beliefd/api/grpcapi"
	"github.com/beliefd/beliefd/api/httpapi"
	"github.com/beliefd/beliefd/api/metrics"
	"github.com/beliefd/beliefd/service/examples"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/memstore"
	"github.com/beliefd/beliefd/worker"
	"github.com/beliefd/beliefd/worker/redisstore"
)

// parseServerFlags parses and validates the flags and BELIEFD_* variables
// of serve (api) or worker.
func parseServerFlags(name, synopsis string, args []string, stdout io.Writer, api bool) (*serverConfig, error) {
	fs := newFlagSet(name, synopsis, stdout)
	cfg := &serverConfig{}
	bindServerFlags(fs, cfg, api)
	if err := parseFlags(fs, args); err != nil {
		return nil, err
	}
	if fs.NArg() > 0 {
		return nil, fmt.Errorf("%w: unexpected argument %q", errUsage, fs.Arg(0))
	}
	if err := applyEnv(fs, os.LookupEnv); err != nil {
		return nil, err
	}
	if err := cfg.Validate(api); err != nil {
		return nil, err
	}
	return cfg, nil
}

// openStore opens the configured backend.
func openStore(ctx context.Context, cfg *serverConfig, log *slog.Logger) (jobs.Store, string, error) {
	if cfg.Redis == "" {
		return memstore.New(memstore.Options{}), "embedded in-memory store", nil
	}
	st, err := redisstore.New(ctx, cfg.Redis, redisstore.Options{Logger: log, Cluster: cfg.RedisCluster})
	if err != nil {
		return nil, "", fmt.Errorf("open redis %s: %w", redactURL(cfg.Redis), err)
	}
	if cfg.RedisCluster {
		return st, "redis cluster " + redactURL(cfg.Redis), nil
	}
	return st, "redis " + redactURL(cfg.Redis), nil
}

// redactURL drops a password from a Redis URL before it is printed.
func redactURL(s string) string {
	if i := strings.Index(s, "@"); i >= 0 {
		if j := strings.Index(s, "://"); j >= 0 && j < i {
			return s[:j+3] + "***" + s[i:]
		}
	}
	return s
}

func newService(store jobs.Store, cfg *serverConfig, log *slog.Logger, tenants *auth.Registry) (*jobs.Service, *metrics.Metrics, *prometheus.Registry, error) {
	reg := prometheus.NewRegistry()
	m, err := metrics.New(reg, metrics.Options{Unfinished: store.Unfinished, Logger: log})
	if err != nil {
		return nil, nil, nil, err
	}
	var policy func(string) jobs.TenantPolicy
	if tenants != nil {
		policy = tenants.Policy
	}
	svc, err := jobs.NewService(store, jobs.Config{
		TenantPolicy:    policy,
		ExactMaxEntries: cfg.ExactLimit,
		MaxUnfinished:   cfg.MaxUnfinished,
		Retention:       cfg.Retention,
		MaxJobTime:      cfg.MaxJobTime,
		LeaseTime:       cfg.LeaseTime,
		Logger:          log,
	}, m)
	if err != nil {
		return nil, nil, nil, err
	}
	return svc, m, reg, nil
}

// process is what serve and worker share: configuration, logger, store and service.
type process struct {
	cfg     *serverConfig
	log     *slog.Logger
	store   jobs.Store
	backend string
	svc     *jobs.Service
	metrics *metrics.Metrics
	reg     *prometheus.Registry
	// tenants is the tenants document in force (nil: the API is open),
	// re-read from tenantsSrc until the process's context ends.
	tenants    *auth.Registry
	tenantsSrc *tenantsSource
	stopFollow context.CancelFunc
}

// startProcess parses the settings, opens the store and builds the service;
// the caller closes p.store.
func startProcess(ctx context.Context, name, synopsis string, args []string, stdout io.Writer, api bool) (*process, error) {
	cfg, err := parseServerFlags(name, synopsis, args, stdout, api)
	if err != nil {
		return nil, err
	}
	log, _ := cfg.logger(os.Stderr)
	tenants, tsrc, err := openTenants(ctx, cfg)
	if err != nil {
		return nil, err
	}
	store, backend, err := openStore(ctx, cfg, log)
	if err != nil {
		if tsrc != nil {
			tsrc.close()
		}
		return nil, err
	}
	svc, m, reg, err := newService(store, cfg, log, tenants)
	if err != nil {
		store.Close()
		if tsrc != nil {
			tsrc.close()
		}
		return nil, err
	}
	p := &process{cfg: cfg, log: log, store: store, backend: backend, svc: svc, metrics: m, reg: reg, tenants: tenants, tenantsSrc: tsrc, stopFollow: func() {}}
	if tsrc != nil {
		fctx, stop := context.WithCancel(ctx)
		done := make(chan struct{})
		go func() { defer close(done); tenants.Follow(fctx, tsrc.fetch, cfg.TenantsReload, log) }()
		p.stopFollow = func() { stop(); <-done }
	}
	return p, nil
}

// close releases the store and the tenants source.
func (p *process) close() {
	p.stopFollow()
	p.store.Close()
	if p.tenantsSrc != nil {
		p.tenantsSrc.close()
	}
}

func cmdServe(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	p, err := startProcess(ctx, "serve", "serve [flags]", args, stdout, true)
	if err != nil {
		return err
	}
	defer p.close()
	cfg, log, store, backend, svc, m, reg := p.cfg, p.log, p.store, p.backend, p.svc, p.metrics, p.reg
	var preloaded []string
	if cfg.Preload {
		if preloaded, err = preload(ctx, svc, p.tenants); err != nil {
			return err
		}
	}
	sq, err := openStanding(ctx, cfg, svc, reg, log)
	if err != nil {
		return err
	}
	defer sq.close()
	serverTLS, err := loadServerTLS(cfg)
	if err != nil {
		return err
	}
	authn := auth.New(p.tenants, log)
	if cfg.MetricsToken {
		authn.RequireMetricsToken()
	}
	admin := auth.NewAdmin(svc, authn, log)
	logAccess(log, cfg, p.tenants, p.tenantsSrc, serverTLS != nil)

	httpLn, err := net.Listen("tcp", cfg.HTTPAddr)
	if err != nil {
		return fmt.Errorf("--http-addr %s: %w", cfg.HTTPAddr, err)
	}
	grpcLn, err := net.Listen("tcp", cfg.GRPCAddr)
	if err != nil {
		httpLn.Close()
		return fmt.Errorf("--grpc-addr %s: %w", cfg.GRPCAddr, err)
	}
	hs := &http.Server{
		Handler: httpapi.New(svc, httpapi.Options{Logger: log, Metrics: m, MetricsHandler: metrics.Handler(reg), MaxModelBytes: cfg.MaxBodyBytes,
			Auth: authn.HTTP, Admin: admin, Standing: sq.svc}),
		TLSConfig:         serverTLS,
		ReadHeaderTimeout: 10 * time.Second,
		ReadTimeout:       time.Minute,
		IdleTimeout:       2 * time.Minute,
	}
	// A model message carries the same content as its JSON document, in
	// fewer bytes; the same limit bounds both.
	gopts := grpcapi.Options{Logger: log, Metrics: m, MaxMessageBytes: int(cfg.MaxBodyBytes), Auth: authn, Admin: admin}
	sopts := grpcapi.ServerOptions(gopts)
	if serverTLS != nil {
		sopts = append(sopts, grpc.Creds(credentials.NewTLS(serverTLS)))
	}
	gs := grpc.NewServer(sopts...)
	gsrv := grpcapi.Register(gs, svc, gopts)
	grpcapi.RegisterStanding(gs, sq.svc, gopts)
	healthCtx, stopHealth := context.WithCancel(context.Background())
	defer stopHealth()
	var wg sync.WaitGroup
	wg.Add(1)
	go func() { defer wg.Done(); gsrv.RunHealth(healthCtx) }()

	errc := make(chan error, 3)
	go func() {
		serve := hs.Serve
		if serverTLS != nil {
			serve = func(ln net.Listener) error { return hs.ServeTLS(ln, "", "") }
		}
		if err := serve(httpLn); err != nil && !errors.Is(err, http.ErrServerClosed) {
			errc <- fmt.Errorf("http: %w", err)
		}
	}()
	go func() {
		if err := gs.Serve(grpcLn); err != nil && !errors.Is(err, grpc.ErrServerStopped) {
			errc <- fmt.Errorf("grpc: %w", err)
		}
	}()
	workCtx, stopWork := context.WithCancel(context.Background())
	poolDone := make(chan struct{})
	if cfg.Workers > 0 {
		pool, err := worker.NewPool(svc, store, worker.Config{Workers: cfg.Workers, ShutdownGrace: cfg.ShutdownTimeout, Logger: log})
		if err != nil {
			stopWork()
			hs.Close()
			gs.Stop()
			return err
		}
		go func() {
			defer close(poolDone)
			if err := pool.Run(workCtx); err != nil && !errors.Is(err, context.Canceled) {
				errc <- fmt.Errorf("workers: %w", err)
			}
		}()
	} else {
		close(poolDone)
	}

	httpURL := "http://" + displayAddr(httpLn.Addr())
	if serverTLS != nil {
		httpURL = "https://" + displayAddr(httpLn.Addr())
	}
	fmt.Fprintf(stdout, "beliefd serving on %s (HTTP) and %s (gRPC), %s, %d sampling workers\n", httpURL, displayAddr(grpcLn.Addr()), backend, cfg.Workers)
	fmt.Fprintf(stdout, "  page    %s/  (models, jobs and standing queries, updated live)\n", httpURL)
	if cfg.Redis == "" {
		fmt.Fprintln(stdout, "  jobs and models live in this process's memory and end with it; use --redis for a shared, durable store")
	}
	if len(preloaded) > 0 {
		fmt.Fprintf(stdout, "  example models: %s\n", strings.Join(preloaded, ", "))
		auth := ""
		if p.tenants != nil {
			auth = `-H "Authorization: Bearer $BELIEFD_TOKEN" `
		}
		fmt.Fprintf(stdout, "  try:  curl -s %s%s/v1/query -d '{\"model\": \"%s\", \"evidence\": {\"alarm_checkout_5xx\": \"firing\"}, \"targets\": [\"bad_deploy\"]}'\n", auth, httpURL, preloaded[0])
	}
	if p.tenants != nil {
		fmt.Fprintf(stdout, "  tokens required (%s: %d tenants); send \"Authorization: Bearer TOKEN\"\n", p.tenantsSrc.where, len(p.tenants.Tenants()))
	} else {
		fmt.Fprintln(stdout, "  no tokens configured: open access, every caller is the open tenant")
	}
	fmt.Fprintf(stdout, "  metrics %s/metrics   health %s/healthz   readiness %s/readyz\n", httpURL, httpURL, httpURL)
	fmt.Fprintln(stdout, "  "+shortCaution)

	var runErr error
	select {
	case <-ctx.Done():
		log.Info("shutting down", "timeout", cfg.ShutdownTimeout)
	case runErr = <-errc:
		log.Error("server failed, shutting down", "err", runErr)
	}
	// Stop taking work and requests; let blocks in flight finish or hand them back.
	stopHealth()
	stopWork()
	sctx, cancel := context.WithTimeout(context.Background(), cfg.ShutdownTimeout)
	defer cancel()
	_ = hs.Shutdown(sctx)
	stopped := make(chan struct{})
	go func() { gs.GracefulStop(); close(stopped) }()
	select {
	case <-stopped:
	case <-sctx.Done():
		gs.Stop()
	}
	select {
	case <-poolDone:
	case <-sctx.Done():
		log.Warn("workers did not stop within the shutdown timeout")
	}
	wg.Wait()
	return runErr
}

// shortCaution is printed at start by the servers.
const shortCaution = "model-based estimates support, and do not replace, the analyses that codes, standards and licensed practice require"

// preload stores the example models whose names the store does not have,
// for the open tenant or, with tenants, for each tenant listed at start.
func preload(ctx context.Context, svc *jobs.Service, tenants *auth.Registry) ([]string, error) {
	if tenants == nil {
		return preloadTenant(ctx, svc)
	}
	var names []string
	for _, t := range tenants.Tenants() {
		var err error
		if names, err = preloadTenant(jobs.WithPrincipal(ctx, jobs.Principal{Tenant: t}), svc); err != nil {
			return nil, fmt.Errorf("tenant %s: %w", t, err)
		}
	}
	return names, nil
}

// preloadTenant stores the example models for the caller of ctx.
func preloadTenant(ctx context.Context, svc *jobs.Service) ([]string, error) {
	var names []string
	for _, name := range examples.Names() {
		if _, _, err := svc.GetModel(ctx, name); err == nil {
			names = append(names, name)
			continue
		} else if !errors.Is(err, jobs.ErrNotFound) {
			return nil, fmt.Errorf("preload %s: %w", name, err)
		}
		raw, err := examples.Raw(name)
		if err != nil {
			return nil, err
		}
		if _, _, err := svc.PutModel(ctx, raw); err != nil {
			return nil, fmt.Errorf("preload %s: %w", name, err)
		}
		names = append(names, name)
	}
	return names, nil
}

// displayAddr turns ":8080" or "[::]:8080" into "localhost:8080".
func displayAddr(a net.Addr) string {
	host, port, err := net.SplitHostPort(a.String())
	if err != nil {
		return a.String()
	}
	if ip := net.ParseIP(host); host == "" || (ip != nil && ip.IsUnspecified()) {
		host = "localhost"
	}
	return net.JoinHostPort(host, port)
}

func cmdWorker(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	p, err := startProcess(ctx, "worker", "worker --redis URL [flags]", args, stdout, false)
	if err != nil {
		return err
	}
	defer p.close()
	cfg, log, store, backend, svc, reg := p.cfg, p.log, p.store, p.backend, p.svc, p.reg
	var ms *http.Server
	if cfg.MetricsAddr != "" {
		ln, err := net.Listen("tcp", cfg.MetricsAddr)
		if err != nil {
			return fmt.Errorf("--metrics-addr %s: %w", cfg.MetricsAddr, err)
		}
		mux := http.NewServeMux()
		mux.Handle("GET /metrics", metrics.Handler(reg))
		mux.HandleFunc("GET /healthz", func(w http.ResponseWriter, _ *http.Request) { io.WriteString(w, "ok\n") })
		mux.HandleFunc("GET /readyz", func(w http.ResponseWriter, r *http.Request) {
			if err := svc.Ready(r.Context()); err != nil {
				http.Error(w, "not ready: "+err.Error(), http.StatusServiceUnavailable)
				return
			}
			io.WriteString(w, "ready\n")
		})
		ms = &http.Server{Handler: mux, ReadHeaderTimeout: 10 * time.Second}
		go ms.Serve(ln)
		defer ms.Close()
	}
	pool, err := worker.NewPool(svc, store, worker.Config{Workers: cfg.Workers, ShutdownGrace: cfg.ShutdownTimeout, Logger: log})
	if err != nil {
		return err
	}
	fmt.Fprintf(stdout, "beliefd worker: %d sampling goroutines on %s\n", cfg.Workers, backend)
	err = pool.Run(ctx)
	if errors.Is(err, context.Canceled) {
		err = nil
	}
	return err
}
