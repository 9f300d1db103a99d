// Package adaptivebench measures the adaptive importance sampler against
// likelihood weighting on generated failure-propagation networks whose
// exact answers are known (junction tree): samples needed for a 10%
// relative half-width on a rare top event and on unlikely evidence,
// interval coverage over repeated seeds, the share of the run spent
// learning, and the mean squared error of posterior marginals at equal
// wall time on random multi-state networks. It backs cmd/beliefd-bench.
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
	// SVG, when set, receives the plot of relative error against samples.
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
	Evidence          float64
	Seconds           float64
	LW, Adaptive      float64 // mean squared error over target states, averaged over seeds
	LWSamples, ADSamp float64
	Learning          float64 // mean share of the adaptive run's wall time spent learning
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
		fmt.Fprintf(w, "Random multi-state networks, unlikely evidence: mean squared error of the posterior marginals at equal wall time\n")
		tw := tabwriter.NewWriter(w, 2, 8, 2, ' ', tabwriter.AlignRight)
		fmt.Fprintln(tw, "case\tP(evidence)\tseconds\tMSE LW\tMSE adaptive\tLW / adaptive\tceiling\tsamples LW\tsamples adaptive\tlearning share\t")
		for _, r := range mse {
			fmt.Fprintf(tw, "%s\t%.3g\t%.2f\t%.3g\t%.3g\t%.3g\t%.3g\t%.3g\t%.3g\t%.1f%%\t\n", r.Case, r.Evidence, r.Seconds, r.LW, r.Adaptive, r.LW/r.Adaptive, r.Ceiling, r.LWSamples, r.ADSamp, 100*r.Learning)
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

// equalTime compares likelihood weighting and the adaptive sampler on
// random networks of a few dozen multi-state variables, each given the
// same wall time, by the mean squared error of every posterior marginal
// of the unobserved variables.
func equalTime(ctx context.Context, cfg Config) ([]MSERow, error) {
	nets := 4
	secs := 2.0
	if cfg.Quick {
		nets, secs = 2, 0.5
	}
	reps := max(2, cfg.Seeds/2)
	var rows []MSERow
	for k := 0; k < nets; k++ {
		rng := rand.New(rand.NewPCG(uint64(20+k), 5))
		doc := testnets.Random(rng, testnets.RandomOptions{Vars: 40, MaxParents: 3, MaxStates: 4, Window: 6, ZeroProb: 0.4})
		net, err := model.Compile(doc, model.Limits{})
		if err != nil {
			return nil, err
		}
		eng, err := compileExact(net)
		if err != nil {
			return nil, err
		}
		// Evidence: the last 12 variables, one after the other, each in its
		// least likely state of positive probability given the evidence so
		// far (ties to the lower state).
		hard := map[string]string{}
		for v := len(net.Vars) - 12; v < len(net.Vars); v++ {
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
		ev, err := net.ResolveEvidence(hard, nil)
		if err != nil {
			return nil, err
		}
		targets, _ := net.ResolveTargets(nil, ev)
		post, err := eng.Posterior(ev, targets)
		if err != nil {
			return nil, err
		}
		row := MSERow{Case: fmt.Sprintf("random-%d (40 vars, 2-4 states)", k), Evidence: math.Exp(post.LogEvidence), Seconds: secs}
		mse := func(m [][]sampling.Interval) float64 {
			s, n := 0.0, 0
			for i := range targets {
				for st := range m[i] {
					d := m[i][st].P - post.Marginals[i][st]
					s += d * d
					n++
				}
			}
			return s / float64(n)
		}
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
			row.LW += mse(lw.Marginals) / float64(reps)
			row.Adaptive += mse(ad.Estimate.Marginals) / float64(reps)
			row.LWSamples += float64(lw.Samples) / float64(reps)
			row.ADSamp += float64(ad.Estimate.Samples) / float64(reps)
			row.Learning += ad.Learning.Elapsed.Seconds() / ad.Estimate.Elapsed.Seconds() / float64(reps)
		}
		ideal, states := 0.0, 0
		for i := range targets {
			for _, p := range post.Marginals[i] {
				ideal += p * (1 - p)
				states++
			}
		}
		row.Ceiling = row.LW * row.LWSamples / (ideal / float64(states))
		logf(cfg, "mse %+v", row)
		rows = append(rows, row)
	}
	return rows, nil
}
