package adaptive

import (
	"context"
	"fmt"
	"math"
	"sort"
	"time"

	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
)

// Defaults of Options.
const (
	DefaultLearnStages   = 8
	DefaultLearnSamples  = 512
	DefaultLearnShare    = 0.05
	DefaultPilotSamples  = 4096
	DefaultRareThreshold = 1e-3
	DefaultMaxTracks     = 8
	DefaultDefensive     = 0.2
	// MaxTracks is the most tracks (the main one and rare-state ones) a run may have.
	MaxTracks = 64
	// maxLearnStages bounds Options.LearnStages (stage numbers must fit
	// the stream ids).
	maxLearnStages = 60
	// maxStageSamples caps a learning stage (stages double in size).
	maxStageSamples = 1 << 16
	// minLearnStages are learned whatever the budget; after them learning
	// stops when a stage's effective sample ratio is less than plateauGain
	// better than the previous stage's, or when the budget is spent.
	minLearnStages = 4
	plateauGain    = 0.05
	minStageESS    = 100
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
// NewStream(seed, 1<<62 | i<<50 | k); the initial block (k = -1) of track
// i from NewStream(seed, 3<<62 | i); chunk c of learning stage l of track
// i from NewStream(seed, 1<<63 | i<<40 | l<<24 | c). Block numbers stay
// below 2^50 (sampling.HardMaxSamples), tracks below 64, stages below 64
// and chunks below 2^24, so the ids never collide.
func trackStream(i int, block int64) uint64 {
	if block < 0 {
		return 3<<62 | uint64(i)
	}
	if i == 0 {
		return uint64(block)
	}
	return 1<<62 | uint64(i)<<50 | uint64(block)
}

func learnStream(i, stage int, chunk int64) uint64 {
	return 1<<63 | uint64(i)<<40 | uint64(stage)<<24 | uint64(chunk)
}

// scaleStage is the stage number of the round that only sets the scale
// of the weights when learning is off.
const scaleStage = 63

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

	// LearnStages is the most learning stages per track, LearnSamples the
	// samples of the first; each next stage draws twice as many (up to
	// 65,536). 0 means the defaults; LearnStages < 0 keeps the importance
	// function that propagation gives.
	LearnStages  int
	LearnSamples int
	// LearnShare bounds the learning samples of the main track by this
	// share of the samples the run is expected to need (from the stopping
	// rule and the effective sample size of the latest stage); 0 means
	// DefaultLearnShare, negative means no bound.
	LearnShare float64
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
	case o.LearnStages > maxLearnStages:
		return bad("learn_stages = %d exceeds %d", o.LearnStages, maxLearnStages)
	case math.IsNaN(o.LearnShare) || o.LearnShare >= 1:
		return bad("learn_share = %g must be below 1", o.LearnShare)
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
	if o.LearnShare == 0 {
		o.LearnShare = DefaultLearnShare
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
	// Stages is the most stages a track learned; Samples the samples
	// drawn over all tracks that the estimate does not use (the learning
	// stages, and the pilot when it is not reused).
	Stages  int
	Samples int64
	// InitialSamples are the samples per track of the initial block: drawn
	// from the final importance functions at the end of learning, they
	// open the estimate like any block.
	InitialSamples int64
	// Sweeps and Converged of loopy belief propagation on the main track.
	Sweeps    int
	Converged bool
	// Elapsed is the wall time of the learning phase (propagation,
	// learning stages, pilot), without the initial block.
	Elapsed time.Duration
}

// NewSampler checks the query, builds the main importance function by
// loopy belief propagation, learns it, draws the pilot from it and picks
// the rare target states, builds and learns their tracks, and draws the
// initial block of every track. Everything it does depends on (net, ev,
// targets, opt) only, not on Workers, so every process that builds the
// same sampler gets the same importance functions and initial block, bit
// for bit. ctx cancels the learning phase.
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
	last, err := s.learnTrack(ctx, main, 0)
	if err != nil {
		return nil, err
	}
	// The initial block: as many samples as the last learning stage drew,
	// or the pilot's when the rare states are to be found.
	rareWanted := len(s.opt.RareTargets) > 0 || s.opt.RareThreshold >= 0
	nInit := int64(last)
	if rareWanted {
		nInit = max(nInit, int64(s.opt.PilotSamples))
	}
	var initElapsed time.Duration
	t0 := time.Now()
	pilot := &TrackStats{}
	s.initTrack(pilot, 0, int(nInit))
	initElapsed += time.Since(t0)
	if rareWanted {
		rare, err := s.pickRare(ctx, pilot)
		if err != nil {
			return nil, err
		}
		for _, rs := range rare {
			s.tracks = append(s.tracks, s.newTrack(rs[0], rs[1], ev.Soft))
		}
	}
	for i := 1; i < len(s.tracks); i++ {
		if s.tracks[i].impossible {
			continue
		}
		if _, err := s.learnTrack(ctx, s.tracks[i], i); err != nil {
			return nil, err
		}
	}
	// The initial block may not take the whole run: it keeps at least one
	// sample per track for the blocks.
	n := min(nInit, s.PerTrackSamples(o.Stop)-1)
	s.initial = s.newStats()
	t0 = time.Now()
	if n == nInit {
		s.initial.Tracks[0] = *pilot // the pilot opens the estimate
	} else {
		s.learn.Samples += pilot.N // drawn for the pilot only
		s.initTrack(&s.initial.Tracks[0], 0, int(n))
	}
	for i := 1; i < len(s.tracks); i++ {
		s.initTrack(&s.initial.Tracks[i], i, int(n))
	}
	initElapsed += time.Since(t0)
	s.initial.Blocks = 0
	s.learn.InitialSamples = max(0, n)
	if s.opt.EpsDelta != nil {
		s.markCrossings(s.initial, make([]float64, len(s.tracks)), -1, s.initial)
	}
	s.learn.Elapsed = time.Since(start) - initElapsed
	return s, nil
}

// initTrack draws the initial block of track i into ts: n samples (none
// when n ≤ 0) from the track's final importance function.
func (s *Sampler) initTrack(ts *TrackStats, i, n int) {
	st := &Stats{Tracks: make([]TrackStats, len(s.tracks))}
	s.reset(st)
	if n > 0 {
		s.runTrack(s.opt.Seed, -1, n, i, &st.Tracks[i], nil)
	}
	*ts = st.Tracks[i]
	ts.Blocks = 0
}

func (s *Sampler) targetIndex(v int) int {
	for i, t := range s.targets {
		if t == v {
			return i
		}
	}
	return -1
}

// learnTrack runs the learning stages of track t (number i): stage k draws
// LearnSamples·2^k samples (at most maxStageSamples) from the current
// importance function and moves every table row towards the weighted
// frequencies of the states seen in it, Q ← Q + η(k)(Q̂ − Q) (the AIS-BN
// update; with η = 1 it is the cross-entropy update), then applies the
// ε-cutoff again. Learning stops after LearnStages stages, when the
// effective sample ratio of a stage is less than plateauGain better than
// the previous stage's (the function has stopped improving), or, for the
// main track, when the next stage would take the learning samples past
// LearnShare of the samples the run is expected to need. The scale of
// the stored weights follows the stages. It returns the size of the last
// stage.
func (s *Sampler) learnTrack(ctx context.Context, t *track, i int) (int, error) {
	stages := s.opt.LearnStages
	m := s.opt.LearnSamples
	t.log2Ref = 0
	if stages < 0 {
		// No learning: one round sets the scale.
		st, err := s.drawStage(ctx, t, i, scaleStage, m)
		if err != nil {
			return 0, err
		}
		s.addLearnSamples(st.n, 0)
		s.rescale(t, st)
		s.rebuild(t)
		return m, nil
	}
	learned := int64(0)
	prevRatio := 0.0
	done := 0
	for k := 0; k < stages; k++ {
		st, err := s.drawStage(ctx, t, i, k, m)
		if err != nil {
			return 0, err
		}
		learned += st.n
		done = k + 1
		ratio := 0.0
		if st.sumW2 > 0 {
			ratio = st.sumW * st.sumW / st.sumW2 / float64(st.n)
		}
		s.rescale(t, st)
		if st.sumW > 0 && !math.IsInf(st.sumW, 0) {
			eta := learnRateA * math.Pow(learnRateB/learnRateA, float64(k)/float64(max(1, stages-1)))
			s.updateTables(t, st, eta)
		}
		s.rebuild(t)
		next := min(2*m, maxStageSamples)
		if k+1 >= minLearnStages {
			// On the main track a plateau is judged only on a stage with
			// enough effective samples: below minStageESS the ratio is
			// mostly noise and the update follows a few weights, so the
			// next, twice larger stage is drawn, within the budget below.
			// Rare-state tracks have no such budget (learning them longer
			// made rare top events take 1.5 times the samples), so they
			// stop on any plateau.
			if ratio < prevRatio*(1+plateauGain) && (i != 0 || ratio*float64(st.n) >= minStageESS) {
				break
			}
			// The effective sample ratio of a few thousand samples is
			// optimistic when the weights are heavy-tailed (the tail is
			// rarely drawn): judge the run by the lower of the last two.
			if i == 0 && s.opt.LearnShare > 0 && float64(learned+int64(next)) > s.opt.LearnShare*s.expectedRun(st, math.Min(ratio, prevRatio)) {
				break
			}
		}
		prevRatio = ratio
		if k+1 < stages {
			m = next
		}
	}
	s.addLearnSamples(learned, done)
	return m, nil
}

// addLearnSamples records learning samples and stages (tracks learn one
// after the other).
func (s *Sampler) addLearnSamples(n int64, stages int) {
	s.learn.Samples += n
	s.learn.Stages = max(s.learn.Stages, stages)
}

// rescale keeps the stored weights of t near 1: it shifts the reference
// by the log2 of the mean weight of the stage st.
func (s *Sampler) rescale(t *track, st *stageStats) {
	if st.sumW > 0 && !math.IsInf(st.sumW, 0) && st.n > 0 {
		t.log2Ref += int(math.Round(math.Log2(st.sumW / float64(st.n))))
	}
}

// expectedRun is the number of samples the main track is expected to
// need under the stopping rule, judged from a learning stage: with an
// effective sample ratio ρ, a proportion p has a variance of about
// p(1-p)/(ρN) and P(evidence) a relative variance of about (1/ρ - 1)/N.
// Without a precision rule it is the sample cap.
func (s *Sampler) expectedRun(st *stageStats, ratio float64) float64 {
	stop := s.opt.Stop
	n := float64(stop.MaxSamples)
	if (stop.AbsErr <= 0 && stop.RelErr <= 0) || !(ratio > 0) || !(st.sumW > 0) {
		return n
	}
	z := sampling.TwoSidedZ(confidenceOf(stop))
	need := math.Inf(1)
	if stop.RelErr > 0 {
		r := 0.0
		if s.hasEv {
			r = 1/ratio - 1
		}
		for i, v := range s.targets {
			if s.clamped[i] >= 0 {
				continue
			}
			off := int(s.tOff[i])
			for k := range s.net.Vars[v].States {
				if p := st.stateW[off+k] / st.sumW; p > 0 && p < 1 {
					r = math.Max(r, (1-p)/(p*ratio))
				}
			}
		}
		need = math.Min(need, z*z*r/(stop.RelErr*stop.RelErr))
	}
	if stop.AbsErr > 0 {
		r := 0.0
		for i, v := range s.targets {
			if s.clamped[i] >= 0 {
				continue
			}
			off := int(s.tOff[i])
			for k := range s.net.Vars[v].States {
				p := st.stateW[off+k] / st.sumW
				r = math.Max(r, p*(1-p)/ratio)
			}
		}
		need = math.Min(need, z*z*r/(stop.AbsErr*stop.AbsErr))
	}
	return math.Min(n, need)
}

// updateTables moves the rows of t.q that the stage visited at least
// minRowVisits times towards the weighted frequencies of their states.
func (s *Sampler) updateTables(t *track, st *stageStats, eta float64) {
	for _, off32 := range st.touched {
		off := int(off32)
		c := int(s.rowCard[off])
		if st.visits[off] < minRowVisits {
			continue
		}
		cnt := st.counts[off : off+c]
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

// pickRare returns the (variable, state) pairs that get their own tracks,
// judged from the pilot (the main track's initial block): the states of
// the rare targets the caller named (all but a state whose pilot estimate
// is at least 1/2, which the main track estimates well), then target
// states whose pilot estimate is below the threshold, smallest first, up
// to MaxTracks-1 tracks.
func (s *Sampler) pickRare(ctx context.Context, pilotStats *TrackStats) ([][2]int, error) {
	if err := ctx.Err(); err != nil {
		return nil, fmt.Errorf("adaptive: learning: %w", err)
	}
	sumW := pilotStats.SumW
	pilot := func(v, st int) float64 {
		i := s.targetIndex(v)
		if sumW <= 0 {
			return 0
		}
		return pilotStats.StateW[int(s.tOff[i])+st] / sumW
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
