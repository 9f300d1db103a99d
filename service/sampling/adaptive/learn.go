package adaptive

import (
	"context"
	"fmt"
	"math"
	"sort"
	"sync"
	"time"

	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
)

// Defaults of Options.
const (
	DefaultLearnStages   = 4
	DefaultLearnSamples  = 2048
	DefaultPilotSamples  = 4096
	DefaultRareThreshold = 1e-3
	DefaultMaxTracks     = 8
	DefaultDefensive     = 0.2
	// MaxTracks is the most tracks (the main one and rare-state ones) a run may have.
	MaxTracks = 64
	// Learning rate schedule η(k) = a·(b/a)^(k/K) (AIS-BN; the constants
	// are from memory of Cheng & Druzdzel 2000).
	learnRateA = 0.4
	learnRateB = 0.14
	// minRowVisits: a table row is updated only when at least this many
	// samples of the stage visited it, so that rows seen once by chance do
	// not jump to a point mass.
	minRowVisits = 8
)

// Reserved stream ids. Sampling block k of track 0 draws from
// NewStream(seed, k); block k of track i ≥ 1 from
// NewStream(seed, 1<<62 | i<<50 | k); learning stage l of track i from
// NewStream(seed, 1<<63 | i<<20 | l). Block numbers stay below 2^50
// (sampling.HardMaxSamples), so the ids never collide.
func trackStream(i int, block int64) uint64 {
	if i == 0 {
		return uint64(block)
	}
	return 1<<62 | uint64(i)<<50 | uint64(block)
}

func learnStream(i, stage int) uint64 { return 1<<63 | uint64(i)<<20 | uint64(stage) }

// Options configure the sampler. Zero values take the defaults.
type Options struct {
	// Seed selects every random stream, of the learning phase as of the
	// sampling blocks.
	Seed uint64
	// Stop is the stopping rule; MaxSamples counts the draws of all tracks.
	Stop sampling.Stop
	// Workers is the number of goroutines; 0 means GOMAXPROCS.
	Workers int
	// BlockSize is the samples per track per block; 0 means
	// sampling.DefaultBlockSize. The answer depends on it.
	BlockSize int
	// Progress, when set, receives partial results at most every
	// ProgressEvery (0 means sampling.DefaultProgressEvery).
	Progress      func(*Result)
	ProgressEvery time.Duration

	// RareTargets are variables (indices into the network) every state of
	// which gets its own track.
	RareTargets []int
	// RareThreshold: a target state whose pilot estimate is below it gets
	// its own track (0 means DefaultRareThreshold; negative turns the
	// automatic choice off).
	RareThreshold float64
	// MaxTracks bounds the tracks, the main one included (0 means
	// DefaultMaxTracks; at most MaxTracks).
	MaxTracks int

	// LearnStages and LearnSamples size the learning phase per track
	// (0 means the defaults; LearnStages < 0 keeps the importance function
	// that propagation gives).
	LearnStages  int
	LearnSamples int
	// PilotSamples are drawn from the learned main importance function to
	// find rare target states (0 means DefaultPilotSamples).
	PilotSamples int
	// Epsilon overrides the ε of the cutoff (0: by number of states, see
	// the package comment).
	Epsilon float64
	// Defensive is the share of the propagation tables mixed into every
	// learned row (0 means DefaultDefensive; negative means none).
	Defensive float64
	temper    float64
	// NoPropagation starts the importance function from the prior instead
	// of loopy belief propagation (for comparison).
	NoPropagation bool

	// EpsDelta, when set, adds the (ε, δ) stopping rule of Dagum, Karp,
	// Luby & Ross (2000) on P(evidence) and on the joint probability of
	// every rare-state track.
	EpsDelta *EpsDelta
}

// EpsDelta asks for an estimate within a factor (1 ± Epsilon) of the truth
// with probability at least 1 - Delta.
type EpsDelta struct {
	Epsilon float64 `json:"epsilon"`
	Delta   float64 `json:"delta"`
}

// epsilonFor is the ε of the cutoff for a variable with c states (values
// recalled from the EPIS-BN paper, Yuan & Druzdzel 2003, from memory).
func (o Options) epsilonFor(c int) float64 {
	if o.Epsilon > 0 {
		return o.Epsilon
	}
	switch {
	case c <= 5:
		return 0.006
	case c <= 8:
		return 0.001
	default:
		return 0.0005
	}
}

func (o Options) validate() (Options, error) {
	bad := func(format string, a ...any) (Options, error) {
		return o, fmt.Errorf("adaptive: %w: "+format, append([]any{ErrBadOptions}, a...)...)
	}
	stop, err := o.Stop.Normalize()
	if err != nil {
		return o, fmt.Errorf("adaptive: %w", err)
	}
	o.Stop = stop
	if o.BlockSize == 0 {
		o.BlockSize = sampling.DefaultBlockSize
	}
	switch {
	case o.BlockSize < 1 || o.BlockSize > sampling.MaxBlockSize:
		return bad("block size %d must be between 1 and %d", o.BlockSize, sampling.MaxBlockSize)
	case o.Workers < 0:
		return bad("workers = %d must be positive (0 for one per core)", o.Workers)
	case o.ProgressEvery < 0:
		return bad("progress interval %s must be positive", o.ProgressEvery)
	case math.IsNaN(o.RareThreshold) || o.RareThreshold >= 1:
		return bad("rare_threshold = %g must be below 1", o.RareThreshold)
	case o.MaxTracks < 0 || o.MaxTracks > MaxTracks:
		return bad("max_tracks = %d must be between 1 and %d", o.MaxTracks, MaxTracks)
	case o.LearnSamples < 0 || o.LearnSamples > 1<<24:
		return bad("learn_samples = %d must be between 1 and %d", o.LearnSamples, 1<<24)
	case o.LearnStages > 64:
		return bad("learn_stages = %d exceeds 64", o.LearnStages)
	case o.PilotSamples < 0 || o.PilotSamples > 1<<24:
		return bad("pilot_samples = %d must be between 1 and %d", o.PilotSamples, 1<<24)
	case math.IsNaN(o.Defensive) || o.Defensive >= 1:
		return bad("defensive = %g must be below 1", o.Defensive)
	case math.IsNaN(o.Epsilon) || o.Epsilon < 0 || o.Epsilon >= 0.5:
		return bad("epsilon = %g must be in [0, 0.5)", o.Epsilon)
	}
	if e := o.EpsDelta; e != nil {
		if math.IsNaN(e.Epsilon) || e.Epsilon <= 0 || e.Epsilon >= 1 {
			return bad("eps_delta.epsilon = %g must be in (0, 1)", e.Epsilon)
		}
		if math.IsNaN(e.Delta) || e.Delta <= 0 || e.Delta >= 1 {
			return bad("eps_delta.delta = %g must be in (0, 1)", e.Delta)
		}
	}
	if o.Workers == 0 {
		o.Workers = defaultWorkers()
	}
	if o.ProgressEvery == 0 {
		o.ProgressEvery = sampling.DefaultProgressEvery
	}
	if o.RareThreshold == 0 {
		o.RareThreshold = DefaultRareThreshold
	}
	if o.MaxTracks == 0 {
		o.MaxTracks = DefaultMaxTracks
	}
	if o.LearnStages == 0 {
		o.LearnStages = DefaultLearnStages
	}
	if o.LearnSamples == 0 {
		o.LearnSamples = DefaultLearnSamples
	}
	if o.Defensive == 0 {
		o.Defensive = DefaultDefensive
	} else if o.Defensive < 0 {
		o.Defensive = 0
	}
	if o.PilotSamples == 0 {
		o.PilotSamples = DefaultPilotSamples
	}
	return o, nil
}

// LearningReport describes the learning phase.
type LearningReport struct {
	// Stages per track and Samples drawn over all tracks (pilot included).
	Stages  int
	Samples int64
	// Sweeps and Converged of loopy belief propagation on the main track.
	Sweeps    int
	Converged bool
	Elapsed   time.Duration
}

// NewSampler checks the query, builds the main importance function by
// loopy belief propagation, learns it, picks the rare target states from a
// pilot run, and builds and learns their tracks. Everything it does depends
// on (net, ev, targets, opt) only, so every process that builds the same
// sampler gets the same importance functions, bit for bit. ctx cancels the
// learning phase.
func NewSampler(ctx context.Context, net *model.Network, ev *model.Evidence, targets []int, opt Options) (*Sampler, error) {
	start := time.Now()
	if net == nil || len(net.Vars) == 0 {
		return nil, fmt.Errorf("adaptive: %w: the network has no variables", model.ErrInvalid)
	}
	o, err := opt.validate()
	if err != nil {
		return nil, err
	}
	if ev == nil {
		ev = net.NoEvidence()
	}
	if err := checkEvidence(net, ev); err != nil {
		return nil, err
	}
	if len(targets) == 0 {
		if targets, err = net.ResolveTargets(nil, ev); err != nil {
			return nil, fmt.Errorf("adaptive: %w", err)
		}
	}
	s := &Sampler{net: net, targets: append([]int(nil), targets...), opt: o, hasEv: !ev.Empty()}
	if err := s.flatten(ev); err != nil {
		return nil, err
	}
	for _, v := range o.RareTargets {
		if v < 0 || v >= len(net.Vars) {
			return nil, fmt.Errorf("adaptive: %w: rare target index %d is not a variable", model.ErrBadEvidence, v)
		}
		if s.targetIndex(v) < 0 {
			return nil, fmt.Errorf("adaptive: %w: rare target %q is not among the targets", model.ErrBadEvidence, net.Vars[v].Name)
		}
	}
	main := s.newTrack(-1, -1, ev.Soft)
	if main.impossible {
		return nil, fmt.Errorf("adaptive: %w: propagation shows that no assignment of the network is consistent with it", ErrImpossibleEvidence)
	}
	s.tracks = []*track{main}
	s.learn.Sweeps, s.learn.Converged = main.bp.sweeps, main.bp.converged
	if err := s.learnTrack(ctx, main, 0); err != nil {
		return nil, err
	}
	rare, err := s.pickRare(ctx, main)
	if err != nil {
		return nil, err
	}
	for _, rs := range rare {
		s.tracks = append(s.tracks, s.newTrack(rs[0], rs[1], ev.Soft))
	}
	// Rare tracks learn independently, in parallel: each uses its own streams.
	var wg sync.WaitGroup
	errs := make([]error, len(s.tracks))
	sem := make(chan struct{}, o.Workers)
	for i := 1; i < len(s.tracks); i++ {
		wg.Add(1)
		go func() {
			defer wg.Done()
			sem <- struct{}{}
			defer func() { <-sem }()
			if !s.tracks[i].impossible {
				errs[i] = s.learnTrack(ctx, s.tracks[i], i)
			}
		}()
	}
	wg.Wait()
	for _, e := range errs {
		if e != nil {
			return nil, e
		}
	}
	s.learn.Elapsed = time.Since(start)
	return s, nil
}

func (s *Sampler) targetIndex(v int) int {
	for i, t := range s.targets {
		if t == v {
			return i
		}
	}
	return -1
}

// learnTrack runs the learning stages of track t (number i): each stage
// draws LearnSamples samples from the current importance function and
// moves every table row towards the weighted frequencies of the states
// seen in it, Q ← Q + η(k)(Q̂ − Q) (the AIS-BN update; with η = 1 it is the
// cross-entropy update), then applies the ε-cutoff again. The scale of
// the stored weights is set from the last stage.
func (s *Sampler) learnTrack(ctx context.Context, t *track, i int) error {
	stages := s.opt.LearnStages
	m := s.opt.LearnSamples
	x := make([]int32, len(s.nodes))
	offs := make([]int32, len(s.nodes))
	counts := make([]float64, len(s.prob))
	visits := make([]int32, len(s.prob))
	// Scale from a first look: the weights of a short run of the
	// propagation function, in log2.
	t.log2Ref = 0
	if stages < 0 {
		stages = 0
	}
	for k := 0; k <= stages; k++ {
		if err := ctx.Err(); err != nil {
			return fmt.Errorf("adaptive: learning: %w", err)
		}
		r := sampling.NewStream(s.opt.Seed, learnStream(i, k))
		clear(counts)
		clear(visits)
		sumW := 0.0
		for n := 0; n < m; n++ {
			w := s.draw(t, &r, x, offs)
			if !(w > 0) {
				continue
			}
			sumW += w
			if k == stages {
				continue // the last round only sets the scale
			}
			if s.opt.temper > 0 {
				w = math.Pow(w, s.opt.temper)
			}
			for v := range s.nodes {
				if t.ev[v] >= 0 {
					continue
				}
				counts[offs[v]+x[v]] += w
				visits[offs[v]]++ // row visits counted on the row's first entry
			}
		}
		s.learn.Samples += int64(m)
		if sumW > 0 && !math.IsInf(sumW, 0) {
			// Keep stored weights near 1: shift the reference by the
			// log2 of the mean weight of this stage.
			t.log2Ref += int(math.Round(math.Log2(sumW / float64(m))))
		}
		if k == stages {
			break
		}
		if sumW > 0 {
			eta := learnRateA * math.Pow(learnRateB/learnRateA, float64(k)/float64(max(1, stages)))
			s.updateTables(t, counts, visits, eta)
		}
		s.rebuild(t)
	}
	if stages > s.learn.Stages {
		s.learn.Stages = stages
	}
	s.rebuild(t)
	return nil
}

// updateTables moves the rows of t.q towards the weighted frequencies in
// counts, for rows visited at least minRowVisits times.
func (s *Sampler) updateTables(t *track, counts []float64, visits []int32, eta float64) {
	for v := range s.nodes {
		if t.ev[v] >= 0 {
			continue
		}
		nd := &s.nodes[v]
		c := int(nd.card)
		rows := s.net.Vars[v].Rows
		for r := 0; r < rows; r++ {
			off := int(nd.tab) + r*c
			if visits[off] < minRowVisits {
				continue
			}
			cnt := counts[off : off+c]
			sum := 0.0
			for _, w := range cnt {
				sum += w
			}
			if !(sum > 0) || math.IsInf(sum, 0) {
				continue
			}
			q := t.q[off : off+c]
			q0 := t.q0[off : off+c]
			for k := range q {
				q[k] += eta * (cnt[k]/sum - q[k])
				q[k] = (1-s.opt.Defensive)*q[k] + s.opt.Defensive*q0[k]
			}
			cutoff(q, s.prob[off:off+c], t.floor[off:off+c])
		}
	}
}

// pickRare draws the pilot run from the learned main track and returns
// the (variable, state) pairs that get their own tracks: the states of the
// rare targets the caller named (all but a state whose pilot estimate is
// at least 1/2, which the main track estimates well), then target states
// whose pilot estimate is below the threshold, smallest first, up to
// MaxTracks-1 tracks.
func (s *Sampler) pickRare(ctx context.Context, main *track) ([][2]int, error) {
	if err := ctx.Err(); err != nil {
		return nil, fmt.Errorf("adaptive: learning: %w", err)
	}
	if len(s.opt.RareTargets) == 0 && s.opt.RareThreshold < 0 {
		return nil, nil
	}
	// Pilot estimates of every target state.
	r := sampling.NewStream(s.opt.Seed, learnStream(0, 1<<19))
	x := make([]int32, len(s.nodes))
	acc := make([]float64, s.states)
	sumW := 0.0
	for n := 0; n < s.opt.PilotSamples; n++ {
		w := s.draw(main, &r, x, nil)
		if !(w > 0) {
			continue
		}
		sumW += w
		for i, v := range s.targets {
			acc[int(s.tOff[i])+int(x[v])] += w
		}
	}
	s.learn.Samples += int64(s.opt.PilotSamples)
	pilot := func(v, st int) float64 {
		i := s.targetIndex(v)
		if sumW <= 0 {
			return 0
		}
		return acc[int(s.tOff[i])+st] / sumW
	}
	room := s.opt.MaxTracks - 1
	var out [][2]int
	seen := map[[2]int]bool{}
	addPair := func(v, st int) {
		p := [2]int{v, st}
		if len(out) < room && !seen[p] && s.possible(v, st) {
			seen[p] = true
			out = append(out, p)
		}
	}
	for _, v := range s.opt.RareTargets {
		if s.baseEv[v] >= 0 {
			continue
		}
		for st := range s.net.Vars[v].States {
			if pilot(v, st) < 0.5 {
				addPair(v, st)
			}
		}
	}
	if s.opt.RareThreshold < 0 {
		return out, nil
	}
	type cand struct {
		p     float64
		v, st int
	}
	var cands []cand
	for i, v := range s.targets {
		if s.clamped[i] >= 0 {
			continue
		}
		for st := range s.net.Vars[v].States {
			if p := pilot(v, st); p < s.opt.RareThreshold {
				cands = append(cands, cand{p, v, st})
			}
		}
	}
	sort.SliceStable(cands, func(a, b int) bool { return cands[a].p < cands[b].p })
	for _, c := range cands {
		addPair(c.v, c.st)
	}
	return out, nil
}

// possible reports whether state st of v has positive probability in some
// row of v's table (a state no row can produce needs no track).
func (s *Sampler) possible(v, st int) bool {
	nd := &s.nodes[v]
	c := int(nd.card)
	for r := 0; r < s.net.Vars[v].Rows; r++ {
		if s.prob[int(nd.tab)+r*c+st] > 0 {
			return true
		}
	}
	return false
}

// checkEvidence validates evidence built by hand; evidence from
// model.ResolveEvidence always passes.
func checkEvidence(net *model.Network, ev *model.Evidence) error {
	n := len(net.Vars)
	if len(ev.Hard) != n || len(ev.Soft) != n {
		return fmt.Errorf("adaptive: %w: evidence has %d hard and %d soft entries, the network has %d variables",
			model.ErrBadEvidence, len(ev.Hard), len(ev.Soft), n)
	}
	for v, h := range ev.Hard {
		x := &net.Vars[v]
		if h >= x.Card() || h < -1 {
			return fmt.Errorf("adaptive: %w: variable %q has no state %d", model.ErrBadEvidence, x.Name, h)
		}
		lik := ev.Soft[v]
		if lik == nil {
			continue
		}
		if h >= 0 {
			return fmt.Errorf("adaptive: %w: variable %q has both hard and soft evidence", model.ErrBadEvidence, x.Name)
		}
		if len(lik) != x.Card() {
			return fmt.Errorf("adaptive: %w: soft evidence on %q has %d likelihoods for %d states", model.ErrBadEvidence, x.Name, len(lik), x.Card())
		}
		pos := false
		for _, l := range lik {
			if math.IsNaN(l) || math.IsInf(l, 0) || l < 0 {
				return fmt.Errorf("adaptive: %w: soft evidence on %q has likelihood %g; want finite and >= 0", model.ErrBadEvidence, x.Name, l)
			}
			pos = pos || l > 0
		}
		if !pos {
			return fmt.Errorf("adaptive: %w: soft evidence on %q is zero for every state", model.ErrBadEvidence, x.Name)
		}
	}
	return nil
}
