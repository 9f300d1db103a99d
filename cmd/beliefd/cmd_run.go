package main

import (
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"io"
	"os"
	"strconv"
	"strings"
	"time"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
)

// queryFlags are the flags that describe a query, shared by run and submit.
type queryFlags struct {
	evidence, soft, targets multiFlag
	method                  *string
	samples                 *int64
	timeout                 *time.Duration
	absErr, relErr          *float64
	confidence              *float64
	seed                    *uint64
	mpe                     *bool
	// Adaptive importance sampling (the query's "adaptive" object).
	rare          multiFlag
	rareThreshold *float64
	epsDelta      *string
}

func bindQueryFlags(fs *flag.FlagSet) *queryFlags {
	qf := &queryFlags{
		method:     fs.String("method", "auto", "auto, exact, forward, rejection, likelihood-weighting, gibbs or adaptive-importance"),
		samples:    fs.Int64("samples", 0, "stop after this many samples (default 1,000,000, or 10^9 when a precision or timeout rule is given)"),
		timeout:    fs.Duration("timeout", 0, "stop sampling after this long, e.g. 30s"),
		absErr:     fs.Float64("abs-err", 0, "stop when every interval's half-width is at most this"),
		relErr:     fs.Float64("rel-err", 0, "stop when every interval's half-width is at most this fraction of its estimate"),
		confidence: fs.Float64("confidence", 0.95, "confidence level of the intervals"),
		seed:       fs.Uint64("seed", 0, "random seed (default: drawn at random and reported)"),
		mpe:        fs.Bool("mpe", false, "also report the most probable explanation (needs exact inference)"),
	}
	fs.Var(&qf.evidence, "evidence", "hard evidence var=state (repeat the flag, or separate with commas)")
	fs.Var(&qf.soft, "soft", "soft evidence var=l1,l2,... one likelihood per state (repeat for more variables)")
	fs.Var(&qf.targets, "target", "variables whose posteriors to report (comma-separated; default all unobserved)")
	fs.Var(&qf.rare, "rare", "adaptive-importance: give each unlikely state of these targets (`VAR,...`, each also a --target) its own\nimportance function, so that even a probability of 1e-9 gets a relative interval")
	qf.rareThreshold = fs.Float64("rare-threshold", 0, "adaptive-importance: target states whose pilot estimate is below `P` get their own importance function\ntoo (default 0.001; negative: only the --rare ones)")
	qf.epsDelta = fs.String("eps-delta", "", "adaptive-importance: also stop once P(evidence) and each rare state's joint probability lie within a\nfactor 1±EPS of the truth with probability at least 1-DELTA (the stopping rule of Dagum, Karp,\nLuby & Ross 2000); `EPS,DELTA` such as 0.1,0.05")
	return qf
}

// adaptive builds the query's adaptive options from the flags; nil when
// none is given.
func (qf *queryFlags) adaptive() (*infer.AdaptiveOptions, error) {
	rare := splitList(qf.rare)
	if len(rare) == 0 && *qf.rareThreshold == 0 && *qf.epsDelta == "" {
		return nil, nil
	}
	a := &infer.AdaptiveOptions{RareTargets: rare, RareThreshold: *qf.rareThreshold}
	if s := *qf.epsDelta; s != "" {
		es, ds, ok := strings.Cut(s, ",")
		eps, err1 := strconv.ParseFloat(strings.TrimSpace(es), 64)
		delta, err2 := strconv.ParseFloat(strings.TrimSpace(ds), 64)
		if !ok || err1 != nil || err2 != nil {
			return nil, fmt.Errorf("%w: --eps-delta %q: want two numbers EPS,DELTA such as 0.1,0.05", errUsage, s)
		}
		a.EpsDelta = &infer.EpsDeltaRule{Epsilon: eps, Delta: delta}
	}
	return a, nil
}

// query builds and validates the query document the flags describe.
func (qf *queryFlags) query(fs *flag.FlagSet, modelRef string) (*infer.Query, error) {
	hard, err := parseEvidence(qf.evidence)
	if err != nil {
		return nil, err
	}
	softEv, err := parseSoft(qf.soft)
	if err != nil {
		return nil, err
	}
	q := &infer.Query{
		Model: modelRef, Evidence: hard, SoftEvidence: softEv, Targets: splitList(qf.targets),
		Method: *qf.method, MPE: *qf.mpe,
		Stop: infer.StopRule{MaxSamples: *qf.samples, AbsErr: *qf.absErr, RelErr: *qf.relErr, Confidence: *qf.confidence},
	}
	if *qf.timeout != 0 {
		q.Stop.Timeout = qf.timeout.String()
	}
	if q.Adaptive, err = qf.adaptive(); err != nil {
		return nil, err
	}
	fs.Visit(func(f *flag.Flag) {
		if f.Name == "seed" {
			q.Seed = qf.seed
		}
	})
	if err := q.Validate(); err != nil {
		return nil, fmt.Errorf("%w: %v", errUsage, err)
	}
	return q, nil
}

func cmdRun(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("run", "run --model FILE [flags]", stdout)
	var (
		modelPath  = fs.String("model", "", "model document (JSON) to query; - reads standard input")
		example    = fs.String("example", "", "query a shipped example model instead of a file (see 'beliefd example')")
		asJSON     = fs.Bool("json", false, "print the result document as JSON")
		workers    = fs.Int("workers", 0, "sampling goroutines (default: one per core)")
		exactLimit = fs.Int("exact-limit", 0, "largest junction tree (total table entries) exact inference may build (default 50,000,000)")
		progress   = fs.String("progress", "auto", "live progress line on stderr: auto (when stderr is a terminal), always or never")
	)
	qf := bindQueryFlags(fs)
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if fs.NArg() > 0 {
		return fmt.Errorf("%w: unexpected argument %q (give the model with --model FILE)", errUsage, fs.Arg(0))
	}
	showProgress, err := progressWanted(*progress, stderr)
	if err != nil {
		return err
	}
	net, err := loadModel(*modelPath, *example)
	if err != nil {
		return err
	}
	q, err := qf.query(fs, net.Name)
	if err != nil {
		return err
	}
	runner := infer.NewRunner(infer.Options{ExactMaxEntries: *exactLimit, Workers: *workers})
	var line *progressLine
	var onProgress func(*infer.Result)
	if showProgress {
		stop, _ := q.Stop.Sampling()
		line = &progressLine{w: stderr, stop: stop, start: time.Now()}
		onProgress = line.update
	}
	res, err := runner.Run(ctx, net, q, onProgress)
	if line != nil {
		line.clear()
	}
	if err != nil {
		return err
	}
	return printOut(stdout, net, q, res, *asJSON)
}

func progressWanted(mode string, stderr io.Writer) (bool, error) {
	switch mode {
	case "auto":
		return isTerminal(stderr), nil
	case "always":
		return true, nil
	case "never":
		return false, nil
	}
	return false, fmt.Errorf("%w: --progress %q: want auto, always or never", errUsage, mode)
}

func printOut(stdout io.Writer, net *model.Network, q *infer.Query, res *infer.Result, asJSON bool) error {
	if asJSON {
		enc := json.NewEncoder(stdout)
		enc.SetIndent("", "  ")
		return enc.Encode(res)
	}
	printResult(stdout, net, q, res)
	return nil
}

func loadModel(path, example string) (*model.Network, error) {
	switch {
	case path != "" && example != "":
		return nil, fmt.Errorf("%w: give --model or --example, not both", errUsage)
	case example != "":
		_, net, err := loadExample(example)
		return net, err
	case path == "":
		return nil, fmt.Errorf("%w: no model: give --model FILE (or --example NAME; 'beliefd example' lists them)", errUsage)
	}
	doc, err := readDocument(path)
	if err != nil {
		return nil, err
	}
	net, err := model.Compile(doc, model.Limits{})
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return net, nil
}

func readDocument(path string) (*model.Document, error) {
	var r io.Reader
	if path == "-" {
		r = os.Stdin
	} else {
		f, err := os.Open(path)
		if err != nil {
			return nil, fmt.Errorf("open model: %w", err)
		}
		defer f.Close()
		r = f
	}
	doc, err := model.Decode(r, 0)
	if err != nil {
		return nil, fmt.Errorf("%s: %w", path, err)
	}
	return doc, nil
}

func isTerminal(w io.Writer) bool {
	f, ok := w.(*os.File)
	if !ok {
		return false
	}
	st, err := f.Stat()
	return err == nil && st.Mode()&os.ModeCharDevice != 0
}

// progressLine keeps one status line on a terminal up to date.
type progressLine struct {
	w     io.Writer
	stop  sampling.Stop
	start time.Time
	width int
}

func (p *progressLine) update(r *infer.Result) {
	el := time.Since(p.start).Seconds()
	rate := 0.0
	if el > 0 {
		rate = float64(r.Samples) / el
	}
	widest := r.WidestHalfWidth()
	msg := fmt.Sprintf("%s samples  %s/s  widest ±%.2g", count(float64(r.Samples)), count(rate), widest)
	if eta, ok := p.eta(r, rate); ok {
		msg += "  ETA " + eta.Round(time.Second).String()
	}
	pad := ""
	if n := p.width - len(msg); n > 0 {
		pad = strings.Repeat(" ", n)
	}
	p.width = len(msg)
	fmt.Fprintf(p.w, "\r%s%s", msg, pad)
}

// eta estimates the time left from the sample cap, the timeout and, for an
// absolute precision target, the 1/sqrt(n) shrinking of the widest interval.
func (p *progressLine) eta(r *infer.Result, rate float64) (time.Duration, bool) {
	if rate <= 0 || r.Samples == 0 {
		return 0, false
	}
	need := float64(p.stop.MaxSamples)
	if w := r.WidestHalfWidth(); p.stop.AbsErr > 0 && w > 0 {
		need = min(need, float64(r.Samples)*(w/p.stop.AbsErr)*(w/p.stop.AbsErr))
	}
	left := time.Duration((need - float64(r.Samples)) / rate * float64(time.Second))
	if p.stop.Timeout > 0 {
		left = min(left, p.stop.Timeout-time.Since(p.start))
	}
	return max(left, 0), true
}

func (p *progressLine) clear() {
	if p.width > 0 {
		fmt.Fprintf(p.w, "\r%s\r", strings.Repeat(" ", p.width))
	}
}

// count renders 1234567 as 1.23M.
func count(x float64) string {
	switch {
	case x >= 1e9:
		return fmt.Sprintf("%.2fG", x/1e9)
	case x >= 1e6:
		return fmt.Sprintf("%.2fM", x/1e6)
	case x >= 1e4:
		return fmt.Sprintf("%.1fk", x/1e3)
	}
	return fmt.Sprintf("%.0f", x)
}
