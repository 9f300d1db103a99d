package sampling

import (
	"context"
	"errors"
	"fmt"
	"runtime"
	"sync/atomic"
	"time"

	"github.com/beliefd/beliefd/service/model"
)

// Block sizes and progress defaults of Run.
const (
	DefaultBlockSize     = 8192
	MaxBlockSize         = 1 << 22
	DefaultProgressEvery = 250 * time.Millisecond
)

var (
	// ErrBadOptions is wrapped when Options cannot be used.
	ErrBadOptions = errors.New("bad sampling options")
	// ErrInternal is wrapped when a block fails unexpectedly (a bug).
	ErrInternal = errors.New("internal sampling error")
)

// Options configure Run.
type Options struct {
	// Method is one of MethodForward, MethodRejection,
	// MethodLikelihoodWeighting.
	Method string
	// Seed selects the random streams: block k draws from NewStream(Seed, k).
	Seed uint64
	// Stop is the stopping rule (normalised by Run).
	Stop Stop
	// Workers is the number of goroutines drawing blocks; 0 means GOMAXPROCS.
	Workers int
	// BlockSize is the number of samples per block (the last block of a run
	// may be shorter); 0 means DefaultBlockSize. The answer depends on it,
	// so a run that is to be repeated must keep it.
	BlockSize int
	// Progress, when set, is called from Run's goroutine with a partial
	// estimate at most every ProgressEvery (0 means DefaultProgressEvery).
	// Run waits for it, so it should return quickly.
	Progress      Progress
	ProgressEvery time.Duration
}

// testHookBlock, when set by a test before Run, is called by a worker
// before it draws a block.
var testHookBlock func(block int64)

// Run estimates the posterior marginals of targets (empty: every variable
// without hard evidence) given ev with the sampler opt.Method, drawing
// blocks on opt.Workers goroutines and merging them strictly in block
// order, so that the same seed gives the same bits whatever the number of
// workers. It stops at the first rule of opt.Stop that holds; on timeout or
// cancellation of ctx it returns the estimate of the blocks merged so far
// (StopReason ReasonTimeout or ReasonCancelled), not an error.
func Run(ctx context.Context, net *model.Network, ev *model.Evidence, targets []int, opt Options) (*Estimate, error) {
	start := time.Now()
	stop, err := opt.Stop.Normalize()
	if err != nil {
		return nil, fmt.Errorf("sampling: %w", err)
	}
	bs := opt.BlockSize
	if bs == 0 {
		bs = DefaultBlockSize
	}
	if bs < 1 || bs > MaxBlockSize {
		return nil, fmt.Errorf("sampling: %w: block size %d must be between 1 and %d", ErrBadOptions, opt.BlockSize, MaxBlockSize)
	}
	workers := opt.Workers
	if workers < 0 {
		return nil, fmt.Errorf("sampling: %w: workers = %d must be positive (0 for one per core)", ErrBadOptions, workers)
	}
	if workers == 0 {
		workers = runtime.GOMAXPROCS(0)
	}
	every := opt.ProgressEvery
	if every < 0 {
		return nil, fmt.Errorf("sampling: %w: progress interval %s must be positive", ErrBadOptions, every)
	}
	if every == 0 {
		every = DefaultProgressEvery
	}
	k, err := NewKernel(net, ev, opt.Method, targets)
	if err != nil {
		return nil, err
	}
	r := &runner{k: k, seed: opt.Seed, stop: stop, blockSize: bs, workers: workers,
		progress: opt.Progress, every: every, start: start}
	return r.run(ctx)
}

type runner struct {
	k         *Kernel
	seed      uint64
	stop      Stop
	blockSize int
	workers   int
	progress  Progress
	every     time.Duration
	start     time.Time
}

func (r *runner) run(ctx context.Context) (*Estimate, error) {
	k := r.k
	buf := make([]Interval, 0, k.states+1)
	plan := BlockPlan[*Stats]{
		Blocks:  NumBlocks(r.stop.MaxSamples, r.blockSize),
		Workers: r.workers,
		Start:   r.start,
		Timeout: r.stop.Timeout,
		New:     k.NewStats,
		Run: func(b int64, st *Stats, abort *atomic.Bool) bool {
			if testHookBlock != nil {
				testHookBlock(b)
			}
			return k.runBlock(r.seed, b, BlockLen(b, r.blockSize, r.stop.MaxSamples), st, abort)
		},
		Merge: func(merged, st *Stats, _ int64) error {
			if err := merged.Merge(st); err != nil {
				return fmt.Errorf("sampling: %w: %w", ErrInternal, err)
			}
			return nil
		},
		Stop:  func(merged *Stats) string { return k.stopReason(merged, r.stop, buf) },
		Every: r.every,
	}
	if r.progress != nil {
		plan.Progress = func(merged *Stats) { r.progress(r.estimate(merged, "")) }
	}
	merged, reason, err := RunBlocks(ctx, plan)
	if err != nil {
		return nil, err
	}
	return r.estimate(merged, reason), nil
}

func (r *runner) estimate(merged *Stats, reason string) *Estimate {
	est := r.k.Summarize(merged, r.stop)
	est.Seed = r.seed
	est.StopReason = reason
	est.Elapsed = time.Since(r.start)
	return est
}
