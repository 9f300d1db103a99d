package sampling

import (
	"context"
	"errors"
	"fmt"
	"runtime"
	"sync"
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

type blockResult struct {
	block int64
	st    *Stats
	err   error
}

func (r *runner) run(ctx context.Context) (*Estimate, error) {
	k := r.k
	total := NumBlocks(r.stop.MaxSamples, r.blockSize)
	workers := int(min(int64(r.workers), total))
	// At most `ahead` blocks are handed out and not yet merged, which
	// bounds both the work wasted past the stopping point and the memory.
	ahead := 2 * workers
	jobs := make(chan int64, ahead)
	results := make(chan blockResult, ahead)
	free := make(chan *Stats, ahead+workers)
	var abort atomic.Bool
	var wg sync.WaitGroup
	for range workers {
		wg.Add(1)
		go func() {
			defer wg.Done()
			for b := range jobs {
				if abort.Load() {
					continue
				}
				var st *Stats
				select {
				case st = <-free:
				default:
					st = k.NewStats()
				}
				ok, err := r.runBlock(b, st, &abort)
				if ok || err != nil {
					results <- blockResult{block: b, st: st, err: err}
				}
			}
		}()
	}
	merged := k.NewStats()
	pending := make(map[int64]*Stats, ahead)
	next, m := int64(0), int64(0)
	dispatch := func() {
		for next < total && next < m+int64(ahead) {
			jobs <- next
			next++
		}
	}
	var timeout <-chan time.Time
	if r.stop.Timeout > 0 {
		t := time.NewTimer(r.stop.Timeout - time.Since(r.start))
		defer t.Stop()
		timeout = t.C
	}
	buf := make([]Interval, 0, k.states+1)
	lastProgress := time.Now()
	reason := ""
	var failure error
	if ctx.Err() != nil {
		reason = ReasonCancelled
	} else {
		dispatch()
	}
	for reason == "" && failure == nil {
		select {
		case <-ctx.Done():
			reason = ReasonCancelled
		case <-timeout:
			reason = ReasonTimeout
		case res := <-results:
			if res.err != nil {
				failure = res.err
				break
			}
			pending[res.block] = res.st
			for st, ok := pending[m]; ok && reason == ""; st, ok = pending[m] {
				delete(pending, m)
				if err := merged.Merge(st); err != nil {
					failure = fmt.Errorf("sampling: %w: %w", ErrInternal, err)
					break
				}
				select {
				case free <- st:
				default:
				}
				m++
				reason = k.stopReason(merged, r.stop, buf)
			}
			if reason == "" && failure == nil {
				dispatch()
				if r.progress != nil && merged.N > 0 && time.Since(lastProgress) >= r.every {
					r.progress(r.estimate(merged, ""))
					lastProgress = time.Now()
				}
			}
		}
	}
	abort.Store(true)
	close(jobs)
	wg.Wait()
	if failure != nil {
		return nil, failure
	}
	return r.estimate(merged, reason), nil
}

// runBlock draws one block, turning a panic into an error.
func (r *runner) runBlock(b int64, st *Stats, abort *atomic.Bool) (ok bool, err error) {
	defer func() {
		if p := recover(); p != nil {
			ok, err = false, fmt.Errorf("sampling: %w: block %d: %v", ErrInternal, b, p)
		}
	}()
	if testHookBlock != nil {
		testHookBlock(b)
	}
	return r.k.runBlock(r.seed, b, BlockLen(b, r.blockSize, r.stop.MaxSamples), st, abort), nil
}

func (r *runner) estimate(merged *Stats, reason string) *Estimate {
	est := r.k.Summarize(merged, r.stop)
	est.Seed = r.seed
	est.StopReason = reason
	est.Elapsed = time.Since(r.start)
	return est
}
