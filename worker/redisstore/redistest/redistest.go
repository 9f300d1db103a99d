// Package redistest gives tests a real Redis: the server named by the
// REDIS_URL environment variable, or a private redis-server process on a
// free loopback port with a temporary data directory, stopped when the
// test ends; and a real Redis Cluster: the one named by REDIS_CLUSTER_URL,
// or private redis-server processes joined by redis-cli (cluster.go).
// When neither is possible the test is skipped with a loud reason, except
// under CI=true, where it fails: CI must not pass by skipping the Redis
// tests.
package redistest

import (
	"bytes"
	"context"
	"crypto/rand"
	"fmt"
	"net"
	"os"
	"os/exec"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"
)

// Bounds on the server's start and stop.
const (
	startTimeout = 10 * time.Second
	stopTimeout  = 10 * time.Second
)

// Start returns the URL of a Redis for the test: REDIS_URL when set (shared
// with other tests: use KeyPrefix to keep apart), else a private
// redis-server stopped at the end of the test.
func Start(t testing.TB) string {
	t.Helper()
	if u := os.Getenv("REDIS_URL"); u != "" {
		err := ping(u)
		if err == nil {
			return u
		}
		t.Logf("redistest: REDIS_URL=%s does not answer (%v); starting a private redis-server", u, err)
	}
	return StartServer(t, Options{}).URL()
}

// ping checks that the server at url answers, within a few seconds.
func ping(url string) error {
	opt, err := redis.ParseURL(url)
	if err != nil {
		return err
	}
	opt.DialTimeout, opt.ReadTimeout, opt.MaxRetries, opt.DialerRetries = time.Second, time.Second, -1, 1
	opt.DisableIdentity = true
	rdb := redis.NewClient(opt)
	defer rdb.Close()
	ctx, cancel := context.WithTimeout(context.Background(), 3*time.Second)
	defer cancel()
	return rdb.Ping(ctx).Err()
}

// Options configure a private server.
type Options struct {
	// AppendOnly turns on the append-only file (appendfsync everysec), so
	// that data survives Restart.
	AppendOnly bool
}

// Server is a redis-server process owned by a test.
type Server struct {
	t    testing.TB
	bin  string
	dir  string
	port int
	opt  Options

	// busPort is the cluster bus port of a cluster node; 0 for a
	// standalone server.
	busPort int

	mu   sync.Mutex
	cmd  *exec.Cmd
	exit chan struct{} // closed when cmd has exited
	log  *lockedBuffer
}

// StartServer starts a private redis-server (never the REDIS_URL one) on a
// free loopback port with a temporary data directory; it is stopped when
// the test ends. It skips the test (fails it under CI=true) when no
// redis-server binary can be found.
func StartServer(t testing.TB, opt Options) *Server {
	t.Helper()
	return startServer(t, opt, false)
}

// startServer starts a private redis-server; a cluster node gets a free
// cluster bus port too.
func startServer(t testing.TB, opt Options, clusterNode bool) *Server {
	t.Helper()
	bin := findBinary("redis-server")
	if bin == "" {
		unavailable(t, "no redis-server binary in PATH or /usr/bin, /usr/local/bin")
	}
	s := &Server{t: t, bin: bin, dir: t.TempDir(), opt: opt}
	t.Cleanup(s.Stop)
	var lastErr error
	for range 5 { // a free port may be taken between probe and bind
		port, err := freePort()
		if err != nil {
			t.Fatalf("redistest: free port: %v", err)
		}
		s.port = port
		if clusterNode {
			if s.busPort, err = freePort(); err != nil {
				t.Fatalf("redistest: free port: %v", err)
			}
		}
		if lastErr = s.start(); lastErr == nil {
			return s
		}
	}
	unavailable(t, fmt.Sprintf("redis-server does not start: %v", lastErr))
	return nil
}

// unavailable skips the test, or fails it under CI=true.
func unavailable(t testing.TB, why string) {
	t.Helper()
	msg := "redistest: NO REDIS FOR THIS TEST (" + why + "); set REDIS_URL=redis://HOST:PORT/DB or install redis-server"
	if os.Getenv("CI") == "true" {
		t.Fatal(msg + " [CI=true: failing instead of skipping]")
	}
	t.Skip(msg)
}

// findBinary looks for a Redis program in PATH and the usual places.
func findBinary(name string) string {
	if p, err := exec.LookPath(name); err == nil {
		return p
	}
	for _, dir := range []string{"/usr/bin", "/usr/local/bin"} {
		p := dir + "/" + name
		if fi, err := os.Stat(p); err == nil && !fi.IsDir() {
			return p
		}
	}
	return ""
}

func freePort() (int, error) {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return 0, err
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port, nil
}

// URL is the server's redis:// URL (database 0).
func (s *Server) URL() string { return "redis://" + s.Addr() + "/0" }

// Addr is the server's host:port.
func (s *Server) Addr() string { return net.JoinHostPort("127.0.0.1", strconv.Itoa(s.port)) }

// Dir is the server's data directory.
func (s *Server) Dir() string { return s.dir }

// Log returns what the server has written so far.
func (s *Server) Log() string { return s.log.String() }

func (s *Server) args() []string {
	a := []string{
		"--port", strconv.Itoa(s.port),
		"--bind", "127.0.0.1",
		"--save", "",
		"--dir", s.dir,
		"--daemonize", "no",
		"--logfile", "",
	}
	if s.busPort != 0 {
		a = append(a, "--cluster-enabled", "yes", "--cluster-config-file", "nodes.conf",
			"--cluster-port", strconv.Itoa(s.busPort), "--cluster-node-timeout", "2000")
	}
	if s.opt.AppendOnly {
		a = append(a, "--appendonly", "yes", "--appendfsync", "everysec")
	} else {
		a = append(a, "--appendonly", "no")
	}
	return a
}

// start launches the process and waits until it answers PING.
func (s *Server) start() error {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.cmd != nil {
		return fmt.Errorf("redistest: server on port %d is running", s.port)
	}
	log := &lockedBuffer{}
	cmd := exec.Command(s.bin, s.args()...)
	cmd.Dir = s.dir
	cmd.Stdout, cmd.Stderr = log, log
	cmd.SysProcAttr = sysProcAttr()
	if err := cmd.Start(); err != nil {
		return fmt.Errorf("redistest: start %s: %w", s.bin, err)
	}
	exit := make(chan struct{})
	go func() { _ = cmd.Wait(); close(exit) }()

	rdb := redis.NewClient(&redis.Options{
		Addr: s.Addr(), DialTimeout: 200 * time.Millisecond, ReadTimeout: 200 * time.Millisecond,
		MaxRetries: -1, DialerRetries: 1, DisableIdentity: true,
	})
	defer rdb.Close()
	deadline := time.Now().Add(startTimeout)
	for {
		// Probe the port first: a refused dial by the client would be logged.
		err := probe(s.Addr())
		if err == nil {
			ctx, cancel := context.WithTimeout(context.Background(), 300*time.Millisecond)
			err = rdb.Ping(ctx).Err()
			cancel()
		}
		if err == nil {
			s.cmd, s.exit, s.log = cmd, exit, log
			return nil
		}
		select {
		case <-exit:
			return fmt.Errorf("redistest: redis-server on port %d exited: %s", s.port, strings.TrimSpace(log.String()))
		default:
		}
		if time.Now().After(deadline) {
			_ = cmd.Process.Kill()
			<-exit
			return fmt.Errorf("redistest: redis-server on port %d not ready after %v: %w", s.port, startTimeout, err)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

func probe(addr string) error {
	c, err := net.DialTimeout("tcp", addr, 200*time.Millisecond)
	if err != nil {
		return err
	}
	return c.Close()
}

// Stop stops the server (SIGTERM, which lets it flush the append-only
// file; SIGKILL after a bound). Stopping a stopped server does nothing.
func (s *Server) Stop() {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.cmd == nil {
		return
	}
	_ = s.cmd.Process.Signal(syscall.SIGTERM)
	select {
	case <-s.exit:
	case <-time.After(stopTimeout):
		_ = s.cmd.Process.Kill()
		<-s.exit
	}
	s.cmd = nil
}

// Restart stops the server and starts it again on the same port with the
// same data directory.
func (s *Server) Restart() {
	s.t.Helper()
	s.Stop()
	if err := s.start(); err != nil {
		s.t.Fatalf("redistest: restart: %v", err)
	}
}

// StartAgain starts a stopped server on the same port and data directory.
func (s *Server) StartAgain() {
	s.t.Helper()
	if err := s.start(); err != nil {
		s.t.Fatalf("redistest: start again: %v", err)
	}
}

// KeyPrefix returns a key prefix unique to the test, so tests sharing a
// Redis do not collide. At the end of the test the keys under it are
// deleted (best effort), which matters on a shared REDIS_URL server or
// REDIS_CLUSTER_URL cluster; url may name either.
func KeyPrefix(t testing.TB, url string) string {
	t.Helper()
	name := strings.NewReplacer("/", "_", " ", "_", "{", "_", "}", "_").Replace(t.Name())
	p := "test:" + name + ":" + rand.Text()[:8]
	t.Cleanup(func() { deleteKeys(url, p+":*") })
	return p
}

// deleteKeys deletes the keys matching pattern on the server at url, or on
// every primary of the cluster that url names (best effort, bounded).
func deleteKeys(url, pattern string) {
	ctx, cancel := context.WithTimeout(context.Background(), 5*time.Second)
	defer cancel()
	scanDelete := func(ctx context.Context, node, all redis.Cmdable) error {
		iter := node.Scan(ctx, 0, pattern, 500).Iterator()
		var batch []string
		flush := func() {
			// One DEL per key: on a cluster the keys live in many slots.
			pipe := all.Pipeline()
			for _, k := range batch {
				pipe.Del(ctx, k)
			}
			_, _ = pipe.Exec(ctx)
			batch = batch[:0]
		}
		for iter.Next(ctx) {
			if batch = append(batch, iter.Val()); len(batch) == 500 {
				flush()
			}
		}
		if len(batch) > 0 {
			flush()
		}
		return iter.Err()
	}
	if opt, err := redis.ParseURL(url); err == nil {
		opt.DialTimeout, opt.ReadTimeout, opt.MaxRetries, opt.DialerRetries = time.Second, time.Second, -1, 1
		opt.DisableIdentity = true
		rdb := redis.NewClient(opt)
		defer rdb.Close()
		_ = scanDelete(ctx, rdb, rdb)
		return
	}
	opt, err := redis.ParseClusterURL(url)
	if err != nil {
		return
	}
	opt.DialTimeout, opt.ReadTimeout, opt.MaxRetries, opt.DialerRetries = time.Second, time.Second, -1, 1
	opt.DisableIdentity = true
	c := redis.NewClusterClient(opt)
	defer c.Close()
	_ = c.ForEachMaster(ctx, func(ctx context.Context, n *redis.Client) error { return scanDelete(ctx, n, c) })
}

// lockedBuffer collects the server's output.
type lockedBuffer struct {
	mu  sync.Mutex
	buf bytes.Buffer
}

func (b *lockedBuffer) Write(p []byte) (int, error) {
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.Write(p)
}

func (b *lockedBuffer) String() string {
	if b == nil {
		return ""
	}
	b.mu.Lock()
	defer b.mu.Unlock()
	return b.buf.String()
}
