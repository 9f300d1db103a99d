// Package worker is beliefd's work runtime. A Pool runs goroutines that
// each take one unit of work at a time from the job service
// (jobs.Service.RunOnce: claim a block under a lease, draw it, commit it,
// merge), back off when there is nothing to do, and wake at once when the
// store signals new work (jobs.TopicQueue). One Pool runs in `beliefd
// serve` next to the API, or alone in `beliefd worker` processes that share
// a Redis store.
//
// Shutdown is graceful: when the Pool's context ends, its goroutines stop
// taking work; units in flight get Config.ShutdownGrace to finish and
// commit, after which their context ends and they hand their work back
// (ReleaseBlock) so that another worker takes it up at once. A panic that
// escapes RunOnce is logged and the goroutine goes on (a panic inside a
// unit already fails that unit's job).
package worker

import (
	"context"
	crand "crypto/rand"
	"encoding/hex"
	"errors"
	"fmt"
	"log/slog"
	"math/rand/v2"
	"os"
	"runtime"
	"runtime/debug"
	"sync"
	"time"

	"github.com/beliefd/beliefd/service/jobs"
)

// Runner runs one unit of work; *jobs.Service implements it.
type Runner interface {
	RunOnce(ctx context.Context, workerID string) (worked bool, err error)
}

// Waker signals new work; jobs.Store implements it.
type Waker interface {
	Subscribe(ctx context.Context, topic string) (signals <-chan struct{}, cancel func(), err error)
}

var (
	_ Runner = (*jobs.Service)(nil)
	_ Waker  = (jobs.Store)(nil)
)

// Defaults of Config.
const (
	DefaultIdleMin       = 50 * time.Millisecond
	DefaultIdleMax       = 2 * time.Second
	DefaultShutdownGrace = 10 * time.Second
)

// ErrBadConfig is wrapped by errors about a Config.
var ErrBadConfig = errors.New("bad worker configuration")

// Config configures a Pool. Zero fields take the documented defaults.
type Config struct {
	// Workers is the number of goroutines; default GOMAXPROCS.
	Workers int
	// Name prefixes the worker IDs that leases are recorded under (each
	// goroutine adds "/N"); default host-pid-random, unique per Pool.
	Name string
	// IdleMin and IdleMax bound the back-off of an idle goroutine, which
	// doubles from IdleMin to IdleMax (with jitter) while there is no work
	// and no signal; defaults 50ms and 2s.
	IdleMin, IdleMax time.Duration
	// ShutdownGrace is how long units in flight may run on after the
	// Pool's context ends before they are handed back; default 10s.
	ShutdownGrace time.Duration
	// Logger receives the pool's logs; default slog.Default().
	Logger *slog.Logger
}

func (c Config) withDefaults() Config {
	if c.Workers == 0 {
		c.Workers = runtime.GOMAXPROCS(0)
	}
	if c.Name == "" {
		host, _ := os.Hostname()
		var b [3]byte
		_, _ = crand.Read(b[:])
		c.Name = fmt.Sprintf("%s-%d-%s", host, os.Getpid(), hex.EncodeToString(b[:]))
	}
	if c.IdleMin == 0 {
		c.IdleMin = DefaultIdleMin
	}
	if c.IdleMax == 0 {
		c.IdleMax = max(DefaultIdleMax, c.IdleMin)
	}
	if c.ShutdownGrace == 0 {
		c.ShutdownGrace = DefaultShutdownGrace
	}
	if c.Logger == nil {
		c.Logger = slog.Default()
	}
	return c
}

// Validate checks the configuration after defaults, naming the field at
// fault.
func (c Config) Validate() error {
	c = c.withDefaults()
	switch {
	case c.Workers < 0:
		return fmt.Errorf("worker: %w: Workers = %d must be positive", ErrBadConfig, c.Workers)
	case c.IdleMin < 0:
		return fmt.Errorf("worker: %w: IdleMin = %s must be positive", ErrBadConfig, c.IdleMin)
	case c.IdleMax < c.IdleMin:
		return fmt.Errorf("worker: %w: IdleMax = %s must be at least IdleMin = %s", ErrBadConfig, c.IdleMax, c.IdleMin)
	case c.ShutdownGrace < 0:
		return fmt.Errorf("worker: %w: ShutdownGrace = %s must be positive", ErrBadConfig, c.ShutdownGrace)
	}
	return nil
}

// Pool runs Config.Workers goroutines that call Runner.RunOnce in a loop.
type Pool struct {
	run  Runner
	wake Waker
	cfg  Config
	log  *slog.Logger

	mu      sync.Mutex
	started bool
	signal  chan struct{} // closed and replaced on each wake-up
}

// NewPool returns a Pool over r. w may be nil: the Pool then polls only.
func NewPool(r Runner, w Waker, cfg Config) (*Pool, error) {
	if r == nil {
		return nil, fmt.Errorf("worker: %w: Runner is nil", ErrBadConfig)
	}
	if err := cfg.Validate(); err != nil {
		return nil, err
	}
	cfg = cfg.withDefaults()
	return &Pool{run: r, wake: w, cfg: cfg, log: cfg.Logger.With("worker", cfg.Name), signal: make(chan struct{})}, nil
}

// Run runs the pool until ctx ends and every goroutine has stopped (at most
// about ShutdownGrace after ctx ends, plus the time to hand work back). A
// Pool runs once.
func (p *Pool) Run(ctx context.Context) error {
	p.mu.Lock()
	if p.started {
		p.mu.Unlock()
		return fmt.Errorf("worker: pool %s: %w: Run called twice", p.cfg.Name, ErrBadConfig)
	}
	p.started = true
	p.mu.Unlock()

	// Units run under workCtx, which outlives ctx by ShutdownGrace.
	workCtx, endWork := context.WithCancel(context.WithoutCancel(ctx))
	defer endWork()
	var wg sync.WaitGroup
	allDone := make(chan struct{})
	go func() {
		select {
		case <-allDone:
			return
		case <-ctx.Done():
		}
		t := time.NewTimer(p.cfg.ShutdownGrace)
		defer t.Stop()
		select {
		case <-allDone:
		case <-t.C:
			p.log.Info("shutdown grace over; handing work back")
			endWork()
		}
	}()
	if p.wake != nil {
		wg.Add(1)
		go func() {
			defer wg.Done()
			p.listen(ctx)
		}()
	}
	p.log.Info("worker pool started", "workers", p.cfg.Workers)
	for i := range p.cfg.Workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			p.loop(ctx, workCtx, fmt.Sprintf("%s/%d", p.cfg.Name, i))
		}()
	}
	wg.Wait()
	close(allDone)
	p.log.Info("worker pool stopped")
	return nil
}

// listen turns queue notifications into wake-ups of every idle goroutine,
// re-subscribing after failures.
func (p *Pool) listen(ctx context.Context) {
	for ctx.Err() == nil {
		sig, cancel, err := p.wake.Subscribe(ctx, jobs.TopicQueue)
		if err != nil {
			p.log.Warn("subscribe to new work failed; polling", "err", err)
			if !sleep(ctx, p.cfg.IdleMax) {
				return
			}
			continue
		}
		for done := false; !done; {
			select {
			case <-ctx.Done():
				done = true
			case <-sig:
				p.broadcast()
			}
		}
		cancel()
	}
}

// broadcast wakes every goroutine waiting for work.
func (p *Pool) broadcast() {
	p.mu.Lock()
	defer p.mu.Unlock()
	close(p.signal)
	p.signal = make(chan struct{})
}

func (p *Pool) wakeup() <-chan struct{} {
	p.mu.Lock()
	defer p.mu.Unlock()
	return p.signal
}

// loop takes work until ctx ends.
func (p *Pool) loop(ctx, workCtx context.Context, id string) {
	idle := p.cfg.IdleMin
	for ctx.Err() == nil {
		wake := p.wakeup() // before RunOnce, so that no signal is missed
		worked, err := p.once(workCtx, id)
		if ctx.Err() != nil {
			return
		}
		if err != nil {
			p.log.Warn("run once", "id", id, "err", err)
		}
		if worked && err == nil {
			idle = p.cfg.IdleMin
			continue
		}
		t := time.NewTimer(jitter(idle))
		select {
		case <-ctx.Done():
		case <-wake:
			idle = p.cfg.IdleMin
		case <-t.C:
			idle = min(2*idle, p.cfg.IdleMax)
		}
		t.Stop()
	}
}

// once calls RunOnce, turning a panic into an error.
func (p *Pool) once(ctx context.Context, id string) (worked bool, err error) {
	defer func() {
		if r := recover(); r != nil {
			p.log.Error("panic in RunOnce", "id", id, "panic", fmt.Sprint(r))
			p.log.Debug("panic stack", "stack", string(debug.Stack()))
			worked, err = false, fmt.Errorf("worker: panic: %v", r)
		}
	}()
	return p.run.RunOnce(ctx, id)
}

// jitter spreads waits over [d/2, d] so that idle goroutines do not poll in
// step.
func jitter(d time.Duration) time.Duration {
	if d <= 1 {
		return d
	}
	return d/2 + rand.N(d/2+1)
}

func sleep(ctx context.Context, d time.Duration) bool {
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-ctx.Done():
		return false
	case <-t.C:
		return true
	}
}
