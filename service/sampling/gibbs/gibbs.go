package gibbs

import (
	"context"
	"errors"
	"fmt"
	"runtime"
	"sync"
	"sync/atomic"
	"time"

	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
)

// Method is the method name reported in estimates.
const Method = "gibbs"

// Defaults and limits of Options.
const (
	DefaultChains        = 4
	MaxChains            = 1024
	DefaultSegmentSweeps = 256
	MaxSegmentSweeps     = 1 << 20
	// The default burn-in per chain is a tenth of the kept sweeps per
	// chain, but at least MinDefaultBurnIn and at most MaxDefaultBurnIn.
	MinDefaultBurnIn = 500
	MaxDefaultBurnIn = 50_000
	// DefaultProgressEvery is the progress interval when Progress is set
	// and ProgressEvery is zero.
	DefaultProgressEvery = time.Second
)

// Stored draws for the diagnostics: at most maxStore per target and chain,
// lowered so that all stored draws take at most storeBudget bytes, but
// never below minStore.
const (
	maxStore    = 1 << 16
	minStore    = 1 << 10
	storeBudget = 64 << 20
)

// ErrBadOptions is wrapped by errors about Options.
var ErrBadOptions = errors.New("bad gibbs options")

// Options shape a Gibbs run. The zero value runs 4 chains with default
// stopping rules.
type Options struct {
	// Seed fixes every random draw: the same seed, model, evidence, targets
	// and options give a bit-identical estimate whatever Workers is (unless
	// a timeout or cancellation ends the run).
	Seed uint64
	// Stop is the stopping rule. MaxSamples counts kept sweeps over all
	// chains; each chain keeps MaxSamples/Chains sweeps at most.
	Stop sampling.Stop
	// Chains is the number of independent chains (default 4).
	Chains int
	// BurnIn is the number of sweeps per chain discarded before keeping
	// any; 0 means the default: a tenth of the kept sweeps per chain,
	// clamped to [MinDefaultBurnIn, MaxDefaultBurnIn].
	BurnIn int64
	// SegmentSweeps is the length of the segments chains are cut into
	// (default 256). It fixes which random stream each sweep uses, so
	// changing it changes the draws.
	SegmentSweeps int
	// Workers is the number of goroutines running chains (0 = GOMAXPROCS).
	Workers int
	// Progress, when set, receives partial estimates every ProgressEvery
	// (default one second), between rounds.
	Progress      sampling.Progress
	ProgressEvery time.Duration

	// storeCap, when positive, replaces the cap on stored draws per target
	// and chain (tests use it to exercise thinning on short runs).
	storeCap int
}

type settings struct {
	chains, segment, workers int
	burnIn, keep             int64
	stop                     sampling.Stop
	progressEvery            time.Duration
}

func (o Options) settle() (settings, error) {
	bad := func(format string, a ...any) (settings, error) {
		return settings{}, fmt.Errorf("gibbs: %w: "+format, append([]any{ErrBadOptions}, a...)...)
	}
	s := settings{chains: o.Chains, segment: o.SegmentSweeps, workers: o.Workers, burnIn: o.BurnIn, progressEvery: o.ProgressEvery}
	switch {
	case o.Chains < 0 || o.Chains > MaxChains:
		return bad("chains = %d must be between 1 and %d", o.Chains, MaxChains)
	case o.SegmentSweeps < 0 || o.SegmentSweeps > MaxSegmentSweeps:
		return bad("segment_sweeps = %d must be between 1 and %d", o.SegmentSweeps, MaxSegmentSweeps)
	case o.Workers < 0:
		return bad("workers = %d must not be negative (0 uses every processor)", o.Workers)
	case o.BurnIn < 0 || o.BurnIn > sampling.HardMaxSamples:
		return bad("burn_in = %d must be between 1 and %d (0 for the default)", o.BurnIn, int64(sampling.HardMaxSamples))
	case o.ProgressEvery < 0:
		return bad("progress_every = %s must not be negative", o.ProgressEvery)
	}
	if s.chains == 0 {
		s.chains = DefaultChains
	}
	if s.segment == 0 {
		s.segment = DefaultSegmentSweeps
	}
	if s.workers == 0 {
		s.workers = runtime.GOMAXPROCS(0)
	}
	s.workers = min(s.workers, s.chains)
	if s.progressEvery == 0 {
		s.progressEvery = DefaultProgressEvery
	}
	stop, err := o.Stop.Normalize()
	if err != nil {
		return settings{}, fmt.Errorf("gibbs: %w", err)
	}
	s.stop = stop
	s.keep = stop.MaxSamples / int64(s.chains)
	if s.keep < 2*minHalf {
		return settings{}, fmt.Errorf("gibbs: %w: max_samples = %d leaves %d kept sweeps for each of %d chains; give at least %d (%d per chain) or fewer chains",
			sampling.ErrBadStop, stop.MaxSamples, s.keep, s.chains, 2*minHalf*int64(s.chains), 2*minHalf)
	}
	if s.burnIn == 0 {
		s.burnIn = min(max(s.keep/10, MinDefaultBurnIn), MaxDefaultBurnIn)
	}
	return s, nil
}

// Run estimates the posterior marginals of targets (variable indices) given
// the evidence (nil for none) by Gibbs sampling. See the package comment for
// the algorithm, the determinism guarantee and the diagnostics. Cancelling
// ctx ends the run with the estimate of the rounds completed so far and
// StopReason "cancelled", not an error. Errors: ErrBadOptions,
// sampling.ErrBadStop, model.ErrBadEvidence, ErrImpossibleEvidence and
// *ReducibleError (ErrReducible).
func Run(ctx context.Context, net *model.Network, ev *model.Evidence, targets []int, opt Options) (*sampling.Estimate, error) {
	began := time.Now()
	if ctx == nil {
		ctx = context.Background()
	}
	s, err := opt.settle()
	if err != nil {
		return nil, err
	}
	p, err := newPlan(net, ev, targets)
	if err != nil {
		return nil, err
	}
	freeTargets := 0
	for _, t := range p.targets {
		if p.hard[t] < 0 {
			freeTargets++
		}
	}
	storeCap := maxStore
	if freeTargets > 0 {
		per := storeBudget / (s.chains * freeTargets)
		if p.maxCard > 256 {
			per /= 2
		}
		storeCap = max(minStore, min(maxStore, per))
	}
	if opt.storeCap > 0 {
		storeCap = opt.storeCap
	}
	initCap := int(min(s.keep, int64(storeCap))) + s.segment + 1
	r := &runner{p: p, seed: opt.Seed, s: s, chains: make([]*chain, s.chains)}
	for c := range r.chains {
		ch := newChain(p, storeCap, initCap)
		ch.rng = sampling.NewStream(opt.Seed, uint64(c)) // segment 0 of chain c
		if err := ch.start(); err != nil {
			return nil, err
		}
		r.chains[c] = ch
	}
	if freeTargets == 0 {
		est := r.estimate()
		est.StopReason = sampling.ReasonExact
		est.Elapsed = time.Since(began)
		return est, nil
	}
	est := r.loop(ctx, began, opt.Progress)
	est.Elapsed = time.Since(began)
	return est, nil
}

type runner struct {
	p      *plan
	seed   uint64
	s      settings
	chains []*chain
}

const (
	whyCancelled = 1
	whyTimeout   = 2
)

// loop runs rounds until a stopping rule holds. Round j runs segment j of
// every chain; statistics are merged only at round boundaries.
func (r *runner) loop(ctx context.Context, began time.Time, progress sampling.Progress) *sampling.Estimate {
	s := r.s
	var abort atomic.Bool
	var why atomic.Int32
	raise := func(w int32) {
		why.CompareAndSwap(0, w)
		abort.Store(true)
	}
	done := make(chan struct{})
	defer close(done)
	go func() {
		var timeout <-chan time.Time
		if s.stop.Timeout > 0 {
			t := time.NewTimer(s.stop.Timeout - time.Since(began))
			defer t.Stop()
			timeout = t.C
		}
		select {
		case <-ctx.Done():
			raise(whyCancelled)
		case <-timeout:
			raise(whyTimeout)
		case <-done:
		}
	}()

	total := s.burnIn + s.keep // sweeps per chain
	seg := int64(s.segment)
	nc := len(r.chains)
	ok := make([]bool, nc)
	precision := s.stop.AbsErr > 0 || s.stop.RelErr > 0
	nextCheck := int64(2 * minHalf)
	lastProgress := time.Now()
	reason := ""
	var final *sampling.Estimate
	for round := int64(0); ; round++ {
		if ctx.Err() != nil {
			raise(whyCancelled)
		}
		if s.stop.Timeout > 0 && time.Since(began) >= s.stop.Timeout {
			raise(whyTimeout)
		}
		if abort.Load() {
			break
		}
		from := round * seg
		if from >= total {
			reason = sampling.ReasonMaxSamples
			break
		}
		to := min(from+seg, total)
		run := func(c int) {
			ch := r.chains[c]
			if round > 0 {
				ch.rng = sampling.NewStream(r.seed, uint64(round)*uint64(nc)+uint64(c))
			}
			ok[c] = ch.runSegment(from, to, s.burnIn, &abort)
		}
		if s.workers <= 1 {
			for c := 0; c < nc; c++ {
				run(c)
			}
		} else {
			var next atomic.Int64
			var wg sync.WaitGroup
			for w := 0; w < s.workers; w++ {
				wg.Add(1)
				go func() {
					defer wg.Done()
					for c := int(next.Add(1) - 1); c < nc; c = int(next.Add(1) - 1) {
						run(c)
					}
				}()
			}
			wg.Wait()
		}
		complete := true
		for _, o := range ok {
			complete = complete && o
		}
		if !complete {
			for _, ch := range r.chains {
				ch.rollback()
			}
			break
		}
		for _, ch := range r.chains {
			ch.commit()
		}
		kept := r.chains[0].kept
		if precision && kept >= nextCheck && kept < s.keep {
			est := r.estimate()
			if met := r.precisionMet(est); met != "" {
				reason, final = met, est
				break
			}
			nextCheck = kept + max(kept/8, 1)
		}
		if progress != nil && time.Since(lastProgress) >= s.progressEvery {
			est := r.estimate()
			est.Elapsed = time.Since(began)
			progress(est)
			lastProgress = time.Now()
		}
	}
	if reason == "" {
		switch why.Load() {
		case whyTimeout:
			reason = sampling.ReasonTimeout
		default:
			reason = sampling.ReasonCancelled
		}
	}
	if final == nil {
		final = r.estimate()
	}
	final.StopReason = reason
	return final
}

// precisionMet applies the precision rules to the intervals of the
// unobserved targets, but only once the diagnostics vouch for them: every
// such target with R-hat at most RHatLimit and bulk ESS at least ESSLimit.
func (r *runner) precisionMet(est *sampling.Estimate) string {
	var ivs []sampling.Interval
	for i, t := range r.p.targets {
		if r.p.hard[t] >= 0 {
			continue
		}
		if !(est.RHat[i] > 0 && est.RHat[i] <= RHatLimit && est.ESS[i] >= ESSLimit) {
			return ""
		}
		ivs = append(ivs, est.Marginals[i]...)
	}
	return r.s.stop.PrecisionMet(ivs)
}
