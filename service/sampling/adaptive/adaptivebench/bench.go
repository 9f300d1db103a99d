// Package adaptivebench measures the adaptive importance sampler against
// likelihood weighting on generated failure-propagation networks whose
// exact answers are known (junction tree): samples needed for a 10%
// relative half-width on a rare top event and on unlikely evidence,
// interval coverage over repeated seeds, the share of the run spent
// learning, and the mean squared error of posterior marginals at equal
// wall time on random multi-state networks, with evidence on observed
// effects of hidden causes (alarms) and on a chain of consecutive
// variables. It backs cmd/beliefd-bench.
package adaptivebench

import (
	"context"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"slices"
	"text/tabwriter"
	"time"

	"github.com/beliefd/beliefd/service/exact"
	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
	"github.com/beliefd/beliefd/service/sampling/adaptive"
)

// Config sizes a benchmark run.
type Config struct {
	// Quick shrinks every part (fewer seeds, smaller caps, shorter runs).
	Quick bool
	// Seeds is the number of repeated runs per case (0: 6, or 3 when Quick).
	Seeds int
	// Workers per run (0: GOMAXPROCS).
	Workers int
	// SVG, when set, receives the plots of error against samples.
	SVG io.Writer
	// Log receives progress lines (may be nil).
	Log io.Writer
	// Parts selects the tables to measure: "top", "evidence", "mse"
	// (empty: all three).
	Parts []string
}

// Parts are the names of the benchmark's tables.
var Parts = []string{"top", "evidence", "mse"}

func (c Config) want(part string) bool {
	return len(c.Parts) == 0 || slices.Contains(c.Parts, part)
}

// relTarget is the relative half-width asked for, at 95%.
const (
	relTarget = 0.1
	z95       = 1.959963984540054
)

// Variant is one configuration of the adaptive sampler being measured.
type Variant struct {
	Name string
	Opt  adaptive.Options
}

// Variants are the configurations compared: the importance function of
// propagation alone, and propagation followed by the learning stages.
var Variants = []Variant{
	{Name: "propagation", Opt: adaptive.Options{LearnStages: -1}},
	{Name: "propagation+learning", Opt: adaptive.Options{}},
}

// RareRow is one line of the rare-probability tables.
type RareRow struct {
	Case     string
	Vars     int
	Exact    float64
	LWNeeded float64 // samples likelihood weighting needs (exact variance)
	Variant  string
	// Samples used by the adaptive sampler (median over seeds), learning
	// and pilot included, and how many runs reached the precision (runs
	// that did not are extrapolated from the half-width they reached).
	Samples  float64
	Reached  int
	Covered  int
	Runs     int
	Learning float64 // median share of the run's time spent learning
	Seconds  float64 // median wall time per run
	Warned   int     // runs with a heavy-tail or uneven-weight warning
}

// MSERow is one line of the equal-time comparison.
type MSERow struct {
	Case              string
	Placement         string // evidence placement (see Placements)
	Observed          int    // observed variables
	Evidence          float64
	Seconds           float64
	LW, Adaptive      float64 // mean squared error over target states, averaged over seeds
	LWSamples, ADSamp float64
	Learning          float64 // mean share of the adaptive run's wall time spent learning
	// LWESS and ADESS are the mean effective sample ratios (Kish's ESS over
	// the samples) of the two methods.
	LWESS, ADESS float64
	// Ceiling is the ratio LW / adaptive that independent draws from the
	// exact posterior would reach at likelihood weighting's speed: the
	// mean squared error times the samples of likelihood weighting over
	// the mean of p(1-p) over the target states.
	Ceiling float64
}

// Run runs the benchmark and writes its tables to w.
func Run(ctx context.Context, w io.Writer, cfg Config) error {
	if cfg.Seeds <= 0 {
		cfg.Seeds = 6
		if cfg.Quick {
			cfg.Seeds = 3
		}
	}
	start := time.Now()
	for _, p := range cfg.Parts {
		if !slices.Contains(Parts, p) {
			return fmt.Errorf("adaptivebench: unknown part %q (want one of %v)", p, Parts)
		}
	}
	if cfg.want("top") {
		top, err := rareTop(ctx, cfg)
		if err != nil {
			return err
		}
		fmt.Fprintf(w, "Rare top event, no evidence: samples to a %.0f%% relative half-width at 95%% (P(top) by junction tree)\n", 100*relTarget)
		writeRare(w, top)
		fmt.Fprintln(w)
	}
	if cfg.want("evidence") {
		ev, err := rareEvidence(ctx, cfg)
		if err != nil {
			return err
		}
		fmt.Fprintf(w, "Unlikely evidence: samples to a %.0f%% relative half-width on P(evidence) at 95%%\n", 100*relTarget)
		writeRare(w, ev)
		fmt.Fprintln(w)
	}
	if cfg.want("mse") {
		mse, err := equalTime(ctx, cfg)
		if err != nil {
			return err
		}
		fmt.Fprintf(w, "Random networks (40 variables, 2-4 states), unlikely evidence: mean squared error of the posterior marginals at equal wall time\n")
		fmt.Fprintf(w, "(chain: the last 12 variables observed; alarms: 10 childless effects of hidden causes observed; each in its least likely state)\n")
		tw := tabwriter.NewWriter(w, 2, 8, 2, ' ', tabwriter.AlignRight)
		fmt.Fprintln(tw, "placement\tcase\tobserved\tP(evidence)\tseconds\tMSE LW\tMSE adaptive\tLW / adaptive\tceiling\tESS LW\tESS adaptive\tsamples LW\tsamples adaptive\tlearning share\t")
		for _, r := range mse {
			fmt.Fprintf(tw, "%s\t%s\t%d\t%.3g\t%.2f\t%.3g\t%.3g\t%.3g\t%.3g\t%.2g%%\t%.2g%%\t%.3g\t%.3g\t%.1f%%\t\n", r.Placement, r.Case, r.Observed, r.Evidence, r.Seconds, r.LW, r.Adaptive, r.LW/r.Adaptive, r.Ceiling,
				100*r.LWESS, 100*r.ADESS, r.LWSamples, r.ADSamp, 100*r.Learning)
		}
		tw.Flush()
	}
	if cfg.SVG != nil {
		if err := plot(ctx, cfg); err != nil {
			return err
		}
	}
	fmt.Fprintf(w, "(%s in all; likelihood weighting's sample counts come from its exact variance, computed by the junction tree, since it would need hours)\n", time.Since(start).Round(time.Second))
	return nil
}

func writeRare(w io.Writer, rows []RareRow) {
	tw := tabwriter.NewWriter(w, 2, 8, 2, ' ', tabwriter.AlignRight)
	fmt.Fprintln(tw, "case\tvars\texact\tLW needs\tvariant\tadaptive needs (median)\tLW / adaptive\treached\tcovered\twarned\tlearning share\tseconds\t")
	for _, r := range rows {
		fmt.Fprintf(tw, "%s\t%d\t%.3g\t%.3g\t%s\t%.3g\t%.3g\t%d/%d\t%d/%d\t%d/%d\t%.1f%%\t%.2f\t\n", r.Case, r.Vars, r.Exact, r.LWNeeded, r.Variant,
			r.Samples, r.LWNeeded/r.Samples, r.Reached, r.Runs, r.Covered, r.Runs, r.Warned, r.Runs, 100*r.Learning, r.Seconds)
	}
	tw.Flush()
}

func logf(cfg Config, format string, a ...any) {
	if cfg.Log != nil {
		fmt.Fprintf(cfg.Log, format+"\n", a...)
	}
}

// topCase is a generated network with the options that make its top event rare.
type topCase struct {
	name string
	seed uint64
	opt  testnets.FaultTreeOptions
}

var topCases = []topCase{
	{"3 of 4 trains + common cause", 1, testnets.FaultTreeOptions{}},
	{"4 of 4 trains + rare common cause", 2, testnets.FaultTreeOptions{Needed: 4, CommonMinP: 1e-9, CommonMaxP: 1e-8}},
	{"3 of 3 trains, no common cause", 3, testnets.FaultTreeOptions{Trains: 3, Components: 40, CommonCauses: -1, MaxP: 1e-4}},
}

func compileExact(net *model.Network) (*exact.Engine, error) {
	return exact.Compile(net, exact.Options{})
}

func rareTop(ctx context.Context, cfg Config) ([]RareRow, error) {
	var rows []RareRow
	cases := topCases
	if cfg.Quick {
		cases = cases[:2]
	}
	for _, c := range cases {
		ft := testnets.FaultTree(rand.New(rand.NewPCG(c.seed, 11)), c.opt)
		net, err := model.Compile(ft.Doc, model.Limits{})
		if err != nil {
			return nil, err
		}
		eng, err := compileExact(net)
		if err != nil {
			return nil, err
		}
		top, _ := net.Index(ft.Top)
		post, err := eng.Posterior(nil, []int{top})
		if err != nil {
			return nil, err
		}
		p := post.Marginals[0][1]
		// Likelihood weighting without evidence is forward sampling: the
		// indicator of the top event is Bernoulli(p).
		need := (z95 / relTarget) * (z95 / relTarget) * (1 - p) / p
		for _, v := range Variants {
			row := RareRow{Case: c.name, Vars: len(net.Vars), Exact: p, LWNeeded: need, Variant: v.Name}
			get := func(r *adaptive.Result) sampling.Interval { return r.Estimate.Marginals[0][1] }
			if err := measure(ctx, cfg, net, nil, []int{top}, v, get, p, &row); err != nil {
				return nil, err
			}
			logf(cfg, "top %-36s %-22s %+v", c.name, v.Name, row)
			rows = append(rows, row)
		}
	}
	return rows, nil
}

// measure runs the variant over the seeds with a relative-precision rule
// and fills the row.
func measure(ctx context.Context, cfg Config, net *model.Network, ev *model.Evidence, targets []int, v Variant,
	get func(*adaptive.Result) sampling.Interval, exactP float64, row *RareRow) error {
	maxSamples := int64(2_000_000)
	if cfg.Quick {
		maxSamples = 500_000
	}
	var samples, learn, secs []float64
	for s := 0; s < cfg.Seeds; s++ {
		o := v.Opt
		o.Seed = uint64(1000 + s)
		o.Workers = cfg.Workers
		o.RareTargets = nil
		if ev == nil || ev.Empty() {
			o.RareTargets = targets
		}
		o.RareThreshold = -1
		o.Stop = sampling.Stop{RelErr: relTarget, Confidence: 0.95, MaxSamples: maxSamples}
		t0 := time.Now()
		res, err := adaptive.Run(ctx, net, ev, targets, o)
		if err != nil {
			return err
		}
		el := time.Since(t0)
		iv := get(res)
		used := float64(res.Estimate.Samples + res.Learning.Samples)
		if res.Estimate.StopReason != sampling.ReasonRelErr && iv.P > 0 {
			// Not reached within the cap: extrapolate by the 1/√N law from
			// the relative half-width reached.
			rhw := iv.HalfWidth() / iv.P
			used = float64(res.Estimate.Samples)*(rhw/relTarget)*(rhw/relTarget) + float64(res.Learning.Samples)
		}
		samples = append(samples, used)
		learn = append(learn, res.Learning.Elapsed.Seconds()/el.Seconds())
		secs = append(secs, el.Seconds())
		row.Runs++
		if res.Estimate.StopReason == sampling.ReasonRelErr {
			row.Reached++
		}
		if iv.Lo <= exactP*(1+1e-12) && exactP <= iv.Hi*(1+1e-12) {
			row.Covered++
		}
		if len(res.Estimate.Warnings) > 0 {
			row.Warned++
		}
	}
	row.Samples, row.Learning, row.Seconds = median(samples), median(learn), median(secs)
	return nil
}

func median(x []float64) float64 {
	if len(x) == 0 {
		return math.NaN()
	}
	s := slices.Clone(x)
	slices.Sort(s)
	if len(s)%2 == 1 {
		return s[len(s)/2]
	}
	return (s[len(s)/2-1] + s[len(s)/2]) / 2
}

// evCase is a generated network with alarms observed firing.
type evCase struct {
	name   string
	seed   uint64
	opt    testnets.FaultTreeOptions
	alarms []int // indices into FaultTreeNet.Alarms observed firing (the first Trains alarms watch the trains)
}

var evCases = []evCase{
	{"alarms on 3 trains", 4, testnets.FaultTreeOptions{}, []int{0, 1, 2}},
	{"alarms on 4 trains", 5, testnets.FaultTreeOptions{}, []int{0, 1, 2, 3}},
	{"alarms on 4 trains + 2 more", 6, testnets.FaultTreeOptions{}, []int{0, 1, 2, 3, 5, 6}},
}

func rareEvidence(ctx context.Context, cfg Config) ([]RareRow, error) {
	var rows []RareRow
	cases := evCases
	if cfg.Quick {
		cases = cases[:2]
	}
	for _, c := range cases {
		ft := testnets.FaultTree(rand.New(rand.NewPCG(c.seed, 11)), c.opt)
		net, err := model.Compile(ft.Doc, model.Limits{})
		if err != nil {
			return nil, err
		}
		hard := map[string]string{}
		for _, a := range c.alarms {
			hard[ft.Alarms[a]] = "firing"
		}
		ev, err := net.ResolveEvidence(hard, nil)
		if err != nil {
			return nil, err
		}
		eng, err := compileExact(net)
		if err != nil {
			return nil, err
		}
		post, err := eng.Posterior(ev, nil)
		if err != nil {
			return nil, err
		}
		pe := math.Exp(post.LogEvidence)
		// Likelihood weighting's weight is w = Π P(alarm fires | parent);
		// E[w²] is P(evidence) in the same network with those table entries
		// squared, which the junction tree computes exactly.
		sq, err := squaredEvidenceNet(ft.Doc, hard)
		if err != nil {
			return nil, err
		}
		sqEng, err := compileExact(sq)
		if err != nil {
			return nil, err
		}
		sqEv, err := sq.ResolveEvidence(hard, nil)
		if err != nil {
			return nil, err
		}
		sqPost, err := sqEng.Posterior(sqEv, nil)
		if err != nil {
			return nil, err
		}
		ew2 := math.Exp(sqPost.LogEvidence)
		need := (z95 / relTarget) * (z95 / relTarget) * (ew2 - pe*pe) / (pe * pe)
		// Targets: the observed alarms (exact), so that the precision rule
		// looks at P(evidence) alone.
		first, _ := net.Index(ft.Alarms[c.alarms[0]])
		for _, v := range Variants {
			row := RareRow{Case: c.name, Vars: len(net.Vars), Exact: pe, LWNeeded: need, Variant: v.Name}
			get := func(r *adaptive.Result) sampling.Interval { return *r.Estimate.Evidence }
			if err := measure(ctx, cfg, net, ev, []int{first}, v, get, pe, &row); err != nil {
				return nil, err
			}
			logf(cfg, "evidence %-30s %-22s %+v", c.name, v.Name, row)
			rows = append(rows, row)
		}
	}
	return rows, nil
}

// squaredEvidenceNet copies doc with the observed state's entry of every
// observed (table) variable squared, the rest of the row moved to another
// state.
func squaredEvidenceNet(doc *model.Document, hard map[string]string) (*model.Network, error) {
	c := *doc
	c.Variables = slices.Clone(doc.Variables)
	for i := range c.Variables {
		v := &c.Variables[i]
		st, ok := hard[v.Name]
		if !ok {
			continue
		}
		if v.Table == nil {
			return nil, fmt.Errorf("adaptivebench: observed variable %q has no table", v.Name)
		}
		e := slices.Index(v.States, st)
		other := 0
		if e == 0 {
			other = 1
		}
		rows := make([][]float64, len(v.Table))
		for r, row := range v.Table {
			nr := make([]float64, len(row))
			nr[e] = row[e] * row[e]
			nr[other] = 1 - nr[e]
			rows[r] = nr
		}
		v.Table = rows
	}
	return model.Compile(&c, model.Limits{})
}

// Placement is how the equal-time comparison chooses the evidence on a
// random network.
type Placement struct {
	Name string
	// Net generates the network from its seed's generator.
	Net func(rng *rand.Rand) *model.Document
	// Observed lists the variables to observe, in the order they are set.
	Observed func(net *model.Network) []int
}

// Placements are the two evidence placements of the equal-time table.
//
// "chain": the last 12 variables in topological order, consecutive, so
// most of their parents are observed too.
//
// "alarms": 10 leaves (variables without children) spread evenly over
// the leaves in topological order, on networks whose last 10 variables
// are effects of causes anywhere in the network (RandomOptions.Leaves):
// observed effects whose causes are hidden, as alarms are.
var Placements = []Placement{
	{
		Name: "chain",
		Net: func(rng *rand.Rand) *model.Document {
			return testnets.Random(rng, testnets.RandomOptions{Vars: 40, MaxParents: 3, MaxStates: 4, Window: 6, ZeroProb: 0.4})
		},
		Observed: func(net *model.Network) []int {
			var obs []int
			for v := len(net.Vars) - 12; v < len(net.Vars); v++ {
				obs = append(obs, v)
			}
			return obs
		},
	},
	{
		Name: "alarms",
		Net: func(rng *rand.Rand) *model.Document {
			return testnets.Random(rng, testnets.RandomOptions{Vars: 40, Leaves: 10, MaxParents: 3, MaxStates: 4, Window: 6, ZeroProb: 0.4})
		},
		Observed: func(net *model.Network) []int { return spreadLeaves(net, 10) },
	},
}

// spreadLeaves returns n of the network's leaves, evenly spaced over all
// of them in topological order (all of them when there are at most n).
func spreadLeaves(net *model.Network, n int) []int {
	var leaves []int
	for i, v := range net.Vars {
		if len(v.Children) == 0 {
			leaves = append(leaves, i)
		}
	}
	if len(leaves) <= n {
		return leaves
	}
	out := make([]int, n)
	for k := range out {
		out[k] = leaves[k*(len(leaves)-1)/(n-1)]
	}
	return out
}

// leastLikely sets each variable of obs, in order, to its least likely
// state of positive probability given the evidence set so far (ties to
// the lower state).
func leastLikely(net *model.Network, eng *exact.Engine, obs []int) (map[string]string, error) {
	hard := map[string]string{}
	for _, v := range obs {
		sofar, err := net.ResolveEvidence(hard, nil)
		if err != nil {
			return nil, err
		}
		post, err := eng.Posterior(sofar, []int{v})
		if err != nil {
			return nil, err
		}
		m := post.Marginals[0]
		best := -1
		for s := range m {
			if m[s] > 0 && (best < 0 || m[s] < m[best]) {
				best = s
			}
		}
		hard[net.Vars[v].Name] = net.Vars[v].States[best]
	}
	return hard, nil
}

// equalTime compares likelihood weighting and the adaptive sampler on
// random networks of a few dozen multi-state variables, each given the
// same wall time, by the mean squared error of every posterior marginal
// of the unobserved variables, for each evidence placement.
func equalTime(ctx context.Context, cfg Config) ([]MSERow, error) {
	var rows []MSERow
	for _, pl := range Placements {
		r, err := equalTimePlacement(ctx, cfg, pl)
		if err != nil {
			return nil, err
		}
		rows = append(rows, r...)
	}
	return rows, nil
}

// mseCase is a random network with its evidence and exact posterior.
type mseCase struct {
	name    string
	net     *model.Network
	ev      *model.Evidence
	targets []int
	post    *exact.Posterior
	// observed is the number of observed variables.
	observed int
}

func newMSECase(pl Placement, k int) (*mseCase, error) {
	// The chain placement keeps the seeds it has always had.
	seed := uint64(20 + k)
	if pl.Name != "chain" {
		seed = uint64(40 + k)
	}
	doc := pl.Net(rand.New(rand.NewPCG(seed, 5)))
	net, err := model.Compile(doc, model.Limits{})
	if err != nil {
		return nil, err
	}
	eng, err := compileExact(net)
	if err != nil {
		return nil, err
	}
	hard, err := leastLikely(net, eng, pl.Observed(net))
	if err != nil {
		return nil, err
	}
	ev, err := net.ResolveEvidence(hard, nil)
	if err != nil {
		return nil, err
	}
	targets, _ := net.ResolveTargets(nil, ev)
	post, err := eng.Posterior(ev, targets)
	if err != nil {
		return nil, err
	}
	return &mseCase{name: fmt.Sprintf("random-%d", k), net: net, ev: ev, targets: targets, post: post, observed: len(hard)}, nil
}

// mse is the mean squared error of the marginals m over every target state.
func (c *mseCase) mse(m [][]sampling.Interval) float64 {
	s, n := 0.0, 0
	for i := range c.targets {
		for st := range m[i] {
			d := m[i][st].P - c.post.Marginals[i][st]
			s += d * d
			n++
		}
	}
	return s / float64(n)
}

// meanPQ is the mean of p(1-p) over the target states: the squared error
// per sample of independent draws from the exact posterior.
func (c *mseCase) meanPQ() float64 {
	ideal, states := 0.0, 0
	for i := range c.targets {
		for _, p := range c.post.Marginals[i] {
			ideal += p * (1 - p)
			states++
		}
	}
	return ideal / float64(states)
}

func equalTimePlacement(ctx context.Context, cfg Config, pl Placement) ([]MSERow, error) {
	nets := 4
	secs := 2.0
	if cfg.Quick {
		nets, secs = 2, 0.5
	}
	reps := max(2, cfg.Seeds/2)
	var rows []MSERow
	for k := 0; k < nets; k++ {
		c, err := newMSECase(pl, k)
		if err != nil {
			return nil, err
		}
		net, ev, targets := c.net, c.ev, c.targets
		row := MSERow{Case: c.name, Placement: pl.Name, Observed: c.observed, Evidence: math.Exp(c.post.LogEvidence), Seconds: secs}
		stop := sampling.Stop{Timeout: time.Duration(secs * float64(time.Second)), MaxSamples: sampling.PrecisionMaxSamples}
		for r := 0; r < reps; r++ {
			lw, err := sampling.Run(ctx, net, ev, targets, sampling.Options{Method: sampling.MethodLikelihoodWeighting, Seed: uint64(r + 1), Stop: stop, Workers: cfg.Workers})
			if err != nil {
				return nil, err
			}
			ad, err := adaptive.Run(ctx, net, ev, targets, adaptive.Options{Seed: uint64(r + 1), Stop: stop, Workers: cfg.Workers, RareThreshold: -1})
			if err != nil {
				return nil, err
			}
			row.LW += c.mse(lw.Marginals) / float64(reps)
			row.Adaptive += c.mse(ad.Estimate.Marginals) / float64(reps)
			row.LWSamples += float64(lw.Samples) / float64(reps)
			row.ADSamp += float64(ad.Estimate.Samples) / float64(reps)
			row.LWESS += lw.EffectiveSamples / float64(lw.Samples) / float64(reps)
			row.ADESS += ad.Estimate.EffectiveSamples / float64(ad.Estimate.Samples) / float64(reps)
			row.Learning += ad.Learning.Elapsed.Seconds() / ad.Estimate.Elapsed.Seconds() / float64(reps)
		}
		row.Ceiling = row.LW * row.LWSamples / c.meanPQ()
		logf(cfg, "mse %+v", row)
		rows = append(rows, row)
	}
	return rows, nil
}
