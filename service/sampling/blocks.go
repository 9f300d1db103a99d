package sampling

import (
	"context"
	"fmt"
	"sync"
	"sync/atomic"
	"time"
)

// BlockPlan describes a block-wise run for RunBlocks. S is the type of a
// block's statistics (a pointer type): samplers other than the ones of this
// package reuse the runner with their own statistics.
type BlockPlan[S any] struct {
	// Blocks is the number of blocks of the run; Workers the goroutines.
	Blocks  int64
	Workers int
	// Start and Timeout bound the run's wall time (Timeout 0: none).
	Start   time.Time
	Timeout time.Duration
	// New returns empty statistics.
	New func() S
	// First, when set, returns the statistics the merge starts from
	// (drawn before block 0); otherwise it starts from New().
	First func() S
	// Run draws block b into st (overwriting it). It returns false when it
	// stopped early because abort was set; its statistics are then dropped.
	Run func(b int64, st S, abort *atomic.Bool) bool
	// Merge adds the statistics of block b into merged. Blocks are merged
	// strictly in order 0, 1, 2, ...
	Merge func(merged, st S, b int64) error
	// Stop returns the stop reason after a merge, or "" to go on.
	Stop func(merged S) string
	// Progress, when set, is called with the merged statistics at most every
	// Every, from RunBlocks's goroutine.
	Progress func(merged S)
	Every    time.Duration
}

type blockResult[S any] struct {
	block int64
	st    S
	err   error
}

// RunBlocks draws blocks on p.Workers goroutines and merges them strictly in
// block order, so the merged statistics, and so every stopping decision,
// are the same whatever the number of workers. It returns the merged
// statistics and the stop reason (ReasonCancelled when ctx ends,
// ReasonTimeout when the timeout passes, "" when every block was merged
// without a rule holding). A panic in a block becomes an error wrapping
// ErrInternal.
func RunBlocks[S any](ctx context.Context, p BlockPlan[S]) (S, string, error) {
	workers := int(min(int64(p.Workers), p.Blocks))
	// At most `ahead` blocks are handed out and not yet merged, which
	// bounds both the work wasted past the stopping point and the memory.
	ahead := 2 * workers
	jobs := make(chan int64, ahead)
	results := make(chan blockResult[S], ahead)
	free := make(chan S, ahead+workers)
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
				var st S
				select {
				case st = <-free:
				default:
					st = p.New()
				}
				ok, err := safeBlock(p.Run, b, st, &abort)
				if ok || err != nil {
					results <- blockResult[S]{block: b, st: st, err: err}
				}
			}
		}()
	}
	merged := p.New()
	if p.First != nil {
		merged = p.First()
	}
	pending := make(map[int64]S, ahead)
	next, m := int64(0), int64(0)
	dispatch := func() {
		for next < p.Blocks && next < m+int64(ahead) {
			jobs <- next
			next++
		}
	}
	var timeout <-chan time.Time
	if p.Timeout > 0 {
		t := time.NewTimer(p.Timeout - time.Since(p.Start))
		defer t.Stop()
		timeout = t.C
	}
	lastProgress := time.Now()
	reason := ""
	var failure error
	if ctx.Err() != nil {
		reason = ReasonCancelled
	} else {
		dispatch()
	}
	for reason == "" && failure == nil && m < p.Blocks {
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
				if err := p.Merge(merged, st, m); err != nil {
					failure = err
					break
				}
				select {
				case free <- st:
				default:
				}
				m++
				reason = p.Stop(merged)
			}
			if reason == "" && failure == nil {
				dispatch()
				if p.Progress != nil && m > 0 && time.Since(lastProgress) >= p.Every {
					p.Progress(merged)
					lastProgress = time.Now()
				}
			}
		}
	}
	abort.Store(true)
	close(jobs)
	wg.Wait()
	return merged, reason, failure
}

// safeBlock runs one block, turning a panic into an error.
func safeBlock[S any](run func(int64, S, *atomic.Bool) bool, b int64, st S, abort *atomic.Bool) (ok bool, err error) {
	defer func() {
		if r := recover(); r != nil {
			ok, err = false, fmt.Errorf("sampling: %w: block %d: %v", ErrInternal, b, r)
		}
	}()
	return run(b, st, abort), nil
}
