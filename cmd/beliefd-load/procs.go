package main

import (
	"bufio"
	"context"
	"fmt"
	"io"
	"net"
	"os"
	"os/exec"
	"regexp"
	"strconv"
	"strings"
	"sync"
	"syscall"
	"time"

	"github.com/redis/go-redis/v9"
)

// child is a process started by beliefd-load; stop ends it.
type child struct {
	name string
	cmd  *exec.Cmd
	done chan struct{}

	mu   sync.Mutex
	tail []string // last lines of output
}

// startChild starts a process and keeps the last lines of its output. When
// ready is not nil it waits up to 30s for a line that matches it and
// returns the submatches.
func startChild(name string, ready *regexp.Regexp, bin string, args ...string) (*child, []string, error) {
	c := &child{name: name, cmd: exec.Command(bin, args...), done: make(chan struct{})}
	pr, pw := io.Pipe()
	c.cmd.Stdout, c.cmd.Stderr = pw, pw
	if err := c.cmd.Start(); err != nil {
		return nil, nil, fmt.Errorf("start %s: %w", name, err)
	}
	found := make(chan []string, 1)
	go func() {
		sc := bufio.NewScanner(pr)
		for sc.Scan() {
			line := sc.Text()
			c.mu.Lock()
			c.tail = append(c.tail, line)
			if len(c.tail) > 20 {
				c.tail = c.tail[1:]
			}
			c.mu.Unlock()
			if ready != nil {
				if m := ready.FindStringSubmatch(line); m != nil {
					select {
					case found <- m:
					default:
					}
				}
			}
		}
	}()
	go func() { _ = c.cmd.Wait(); pw.Close(); close(c.done) }()
	if ready == nil {
		return c, nil, nil
	}
	select {
	case m := <-found:
		return c, m, nil
	case <-c.done:
		return nil, nil, fmt.Errorf("%s exited at start:\n%s", name, c.output())
	case <-time.After(30 * time.Second):
		c.stop()
		return nil, nil, fmt.Errorf("%s not ready within 30s:\n%s", name, c.output())
	}
}

func (c *child) output() string {
	c.mu.Lock()
	defer c.mu.Unlock()
	s := ""
	for _, l := range c.tail {
		s += "  " + l + "\n"
	}
	return s
}

// stop sends SIGTERM, then SIGKILL after 10s, and waits for the process.
func (c *child) stop() {
	_ = c.cmd.Process.Signal(syscall.SIGTERM)
	select {
	case <-c.done:
	case <-time.After(10 * time.Second):
		_ = c.cmd.Process.Kill()
		<-c.done
	}
}

// freeLoopbackPort returns a free TCP port on 127.0.0.1.
func freeLoopbackPort() (int, error) {
	l, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		return 0, err
	}
	defer l.Close()
	return l.Addr().(*net.TCPAddr).Port, nil
}

// localCluster is redis-server, one API process and n worker processes on
// 127.0.0.1.
type localCluster struct {
	dir   string
	redis *child
	api   *child
	works []*child
	base  string
	rdb   *redis.Client
}

func startLocalCluster(ctx context.Context, beliefd, redisServer string, workers int) (lc *localCluster, err error) {
	lc = &localCluster{}
	defer func() {
		if err != nil {
			lc.stop()
		}
	}()
	if lc.dir, err = os.MkdirTemp("", "beliefd-load-redis"); err != nil {
		return lc, err
	}
	port, err := freeLoopbackPort()
	if err != nil {
		return lc, err
	}
	lc.redis, _, err = startChild("redis-server", regexp.MustCompile(`Ready to accept connections`), redisServer,
		"--port", strconv.Itoa(port), "--bind", "127.0.0.1", "--save", "", "--dir", lc.dir,
		"--appendonly", "yes", "--appendfsync", "everysec", "--daemonize", "no", "--logfile", "")
	if err != nil {
		return lc, err
	}
	url := fmt.Sprintf("redis://127.0.0.1:%d/0", port)
	lc.rdb = redis.NewClient(&redis.Options{Addr: fmt.Sprintf("127.0.0.1:%d", port), DialTimeout: time.Second,
		ReadTimeout: time.Second, DisableIdentity: true})
	var m []string
	lc.api, m, err = startChild("beliefd serve", regexp.MustCompile(`serving on (http://[0-9.:]+) `), beliefd,
		"serve", "--redis", url, "--workers", "0", "--http-addr", "127.0.0.1:0", "--grpc-addr", "127.0.0.1:0", "--preload=false")
	if err != nil {
		return lc, err
	}
	lc.base = m[1]
	for i := range workers {
		if ctx.Err() != nil {
			return lc, ctx.Err()
		}
		w, _, err := startChild(fmt.Sprintf("beliefd worker %d", i), regexp.MustCompile(`beliefd worker: `), beliefd,
			"worker", "--redis", url, "--workers", "1", "--metrics-addr", "")
		if err != nil {
			return lc, err
		}
		lc.works = append(lc.works, w)
	}
	return lc, nil
}

// commands reads total_commands_processed from Redis's INFO.
func (lc *localCluster) commands(ctx context.Context) (int64, error) {
	info, err := lc.rdb.Info(ctx, "stats").Result()
	if err != nil {
		return 0, err
	}
	for _, line := range strings.Split(info, "\n") {
		if v, ok := strings.CutPrefix(strings.TrimSpace(line), "total_commands_processed:"); ok {
			return strconv.ParseInt(v, 10, 64)
		}
	}
	return 0, fmt.Errorf("no total_commands_processed in INFO stats")
}

// stop ends every process, workers first, and removes Redis's data.
func (lc *localCluster) stop() {
	var wg sync.WaitGroup
	for _, w := range lc.works {
		wg.Add(1)
		go func() { defer wg.Done(); w.stop() }()
	}
	wg.Wait()
	if lc.api != nil {
		lc.api.stop()
	}
	if lc.rdb != nil {
		lc.rdb.Close()
	}
	if lc.redis != nil {
		lc.redis.stop()
	}
	if lc.dir != "" {
		os.RemoveAll(lc.dir)
	}
}
