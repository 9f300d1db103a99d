package main

import (
	"context"
	"fmt"
	"io"
	"log/slog"
	"maps"
	"slices"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/beliefd/beliefd/api/convert"
	"github.com/beliefd/beliefd/api/metrics"
	beliefv1 "github.com/beliefd/beliefd/proto/belief/v1"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/sampling"
	"github.com/beliefd/beliefd/service/standing"
	"github.com/beliefd/beliefd/worker/redisstore"
)

// standingRuntime is the standing-query service of a serve process with
// its recompute loop running.
type standingRuntime struct {
	svc   *standing.Service
	close func()
}

// openStanding builds the standing-query service on the configured
// backend (the embedded store, or Redis shared with the other API
// processes), registers its gauges on reg and starts its loop; close stops
// the loop and the store.
func openStanding(ctx context.Context, cfg *serverConfig, svc *jobs.Service, reg *prometheus.Registry, log *slog.Logger) (*standingRuntime, error) {
	var store standing.Store = standing.NewMemoryStore()
	closeStore := func() {}
	if cfg.Redis != "" {
		rs, err := redisstore.NewStanding(ctx, cfg.Redis, redisstore.Options{Logger: log, Cluster: cfg.RedisCluster})
		if err != nil {
			return nil, fmt.Errorf("open redis %s for standing queries: %w", redactURL(cfg.Redis), err)
		}
		store, closeStore = rs, func() { _ = rs.Close() }
	}
	sm, err := metrics.NewStanding(reg, metrics.StandingOptions{})
	if err != nil {
		closeStore()
		return nil, err
	}
	ssvc, err := standing.New(store, svc, standing.Config{MaxQueries: cfg.MaxStanding, Logger: log, Observer: sm})
	if err != nil {
		closeStore()
		return nil, err
	}
	sm.Export(ssvc.Snapshot)
	runCtx, stop := context.WithCancel(context.WithoutCancel(ctx))
	done := make(chan struct{})
	go func() { defer close(done); _ = ssvc.Run(runCtx) }()
	return &standingRuntime{svc: ssvc, close: func() { stop(); <-done; closeStore() }}, nil
}

// cmdStanding is the command-line client of the StandingQueryService.
func cmdStanding(ctx context.Context, args []string, stdout, _ io.Writer) error {
	fs := newFlagSet("standing", "standing [--server ADDR] [--token T] [list | get ID | delete ID |\n"+
		"       create --model M --target V ... [--id ID] [--evidence var=state ...] [--method M] [--interval D] |\n"+
		"       evidence ID [--set var=state ...] [--clear var ...] [--replace] [--expect-revision N]]", stdout)
	ep := endpointFlags(fs)
	var targets, ev, set, clear multiFlag
	id := fs.String("id", "", "create: the standing query's ID (alert rules name it); default: one is picked")
	modelRef := fs.String("model", "", "create: model NAME or NAME@VERSION")
	fs.Var(&targets, "target", "create: target variable (repeat or comma-separate)")
	fs.Var(&ev, "evidence", "create: initial evidence var=state (repeat or comma-separate)")
	method := fs.String("method", "", "create: method (auto, exact, likelihood-weighting, ...)")
	maxSamples := fs.Int64("max-samples", 0, "create: stop a sampling recompute after this many samples")
	absErr := fs.Float64("abs-err", 0, "create: stop a sampling recompute at this interval half-width")
	interval := fs.String("interval", "", "create: recompute interval without a change, such as 30s")
	fs.Var(&set, "set", "evidence: set or change var=state (repeat or comma-separate)")
	fs.Var(&clear, "clear", "evidence: clear the evidence on var (repeat or comma-separate)")
	replace := fs.Bool("replace", false, "evidence: the evidence becomes exactly --set")
	expect := fs.Int64("expect-revision", 0, "evidence: fail unless the evidence is at this revision")
	wait := fs.Duration("wait", 5*time.Second, "create and evidence: wait this long for the new result (0: do not wait)")
	asJSON := fs.Bool("json", false, "print the standing queries as JSON")
	// Flags may come before, between and after the action and its ID.
	var words []string
	for {
		if err := parseFlags(fs, args); err != nil {
			return err
		}
		if fs.NArg() == 0 {
			break
		}
		words, args = append(words, fs.Arg(0)), fs.Args()[1:]
	}
	verb, rest := "list", []string(nil)
	if len(words) > 0 {
		verb, rest = words[0], words[1:]
	}
	need := map[string]int{"list": 0, "get": 1, "delete": 1, "create": 0, "evidence": 1}
	n, known := need[verb]
	if !known {
		return fmt.Errorf("%w: unknown standing action %q (want list, get, create, evidence or delete)", errUsage, verb)
	}
	if len(rest) != n {
		return fmt.Errorf("%w: standing %s takes %d argument(s), not %d", errUsage, verb, n, len(rest))
	}
	waitFor := ""
	if *wait > 0 {
		waitFor = wait.String()
	}
	c, err := ep.dial()
	if err != nil {
		return err
	}
	defer c.conn.Close()
	sc := beliefv1.NewStandingQueryServiceClient(c.conn)
	var got []*beliefv1.StandingQuery
	switch verb {
	case "list":
		resp, err := sc.ListStandingQueries(ctx, &beliefv1.ListStandingQueriesRequest{})
		if err != nil {
			return rpcError(*ep.server, err)
		}
		got = resp.GetStandingQueries()
		if !*asJSON {
			return printStandingList(stdout, got)
		}
	case "get":
		m, err := sc.GetStandingQuery(ctx, &beliefv1.GetStandingQueryRequest{Id: rest[0]})
		if err != nil {
			return rpcError(*ep.server, err)
		}
		got = append(got, m)
	case "delete":
		if _, err := sc.DeleteStandingQuery(ctx, &beliefv1.DeleteStandingQueryRequest{Id: rest[0]}); err != nil {
			return rpcError(*ep.server, err)
		}
		fmt.Fprintf(stdout, "deleted standing query %s\n", rest[0])
		return nil
	case "create":
		if *modelRef == "" {
			return fmt.Errorf("%w: create needs --model", errUsage)
		}
		evidence, err := parseEvidence(ev)
		if err != nil {
			return err
		}
		spec := &beliefv1.StandingQuerySpec{Id: *id, Model: *modelRef, Targets: splitList(targets), Evidence: evidence,
			Method: *method, Interval: *interval}
		spec.Stop = convert.QueryToProto(&infer.Query{Stop: infer.StopRule{MaxSamples: *maxSamples, AbsErr: *absErr}}).GetStop()
		m, err := sc.CreateStandingQuery(ctx, &beliefv1.CreateStandingQueryRequest{Spec: spec, Wait: waitFor})
		if err != nil {
			return rpcError(*ep.server, err)
		}
		got = append(got, m)
	case "evidence":
		setEv, err := parseEvidence(set)
		if err != nil {
			return err
		}
		m, err := sc.UpdateStandingEvidence(ctx, &beliefv1.UpdateStandingEvidenceRequest{Id: rest[0], Set: setEv, Clear: splitList(clear),
			Replace: *replace, ExpectRevision: *expect, Wait: waitFor})
		if err != nil {
			return rpcError(*ep.server, err)
		}
		got = append(got, m)
	}
	if *asJSON {
		if verb == "list" {
			return writeJSON(stdout, got)
		}
		return writeJSON(stdout, got[0])
	}
	return printStanding(stdout, got[0], c.states(ctx, got[0].GetModel()))
}

// states returns the states of each variable of a model in document
// order, or nil when the model cannot be read (then they print sorted).
func (c *client) states(ctx context.Context, ref string) map[string][]string {
	name, version, _ := strings.Cut(ref, "@")
	v, _ := strconv.Atoi(version)
	resp, err := c.models.GetModel(ctx, &beliefv1.GetModelRequest{Name: name, Version: int64(v)})
	if err != nil {
		return nil
	}
	out := map[string][]string{}
	for _, v := range resp.GetModel().GetVariables() {
		out[v.GetName()] = v.GetStates()
	}
	return out
}

func printStandingList(w io.Writer, qs []*beliefv1.StandingQuery) error {
	tw := tabwriter.NewWriter(w, 2, 4, 2, ' ', 0)
	fmt.Fprintln(tw, "id\tmodel\trevision\tstatus\tresult age\ttargets\tevidence")
	for _, q := range qs {
		age := "-"
		if q.ResultAgeSeconds != nil {
			age = seconds(q.GetResultAgeSeconds())
		}
		fmt.Fprintf(tw, "%s\t%s\t%d\t%s\t%s\t%s\t%s\n", q.GetId(), q.GetModel(), q.GetRevision(), q.GetStatus(), age,
			strings.Join(q.GetTargets(), ","), evidenceText(q.GetEvidence()))
	}
	return tw.Flush()
}

func evidenceText(ev map[string]string) string {
	if len(ev) == 0 {
		return "(none)"
	}
	var parts []string
	for _, k := range slices.Sorted(maps.Keys(ev)) {
		parts = append(parts, k+"="+ev[k])
	}
	return strings.Join(parts, ",")
}

// printStanding shows one standing query and its latest posteriors with
// their intervals (exact ones say so).
func printStanding(w io.Writer, q *beliefv1.StandingQuery, order map[string][]string) error {
	fmt.Fprintf(w, "standing query %s  model %s  method %s  interval %s\n", q.GetId(), q.GetModel(), q.GetMethod(), q.GetInterval())
	fmt.Fprintf(w, "evidence       %s  (revision %d)\n", evidenceText(q.GetEvidence()), q.GetRevision())
	fmt.Fprintf(w, "status         %s\n", q.GetStatus())
	if q.GetError() != "" {
		fmt.Fprintf(w, "error          %s (revision %d)\n", q.GetError(), q.GetErrorRevision())
	}
	r := q.GetResult()
	if r == nil {
		fmt.Fprintln(w, "no result yet")
		return nil
	}
	exact := r.GetMethod() == infer.MethodExact
	how := fmt.Sprintf("%s, %s samples, %s effective", r.GetMethod(), groupDigits(float64(r.GetSamples())), groupDigits(r.GetEffectiveSamples()))
	if exact {
		how = "exact"
	}
	fmt.Fprintf(w, "result         revision %d, %s ago (%s)\n", q.GetResultRevision(), seconds(q.GetResultAgeSeconds()), how)
	tw := tabwriter.NewWriter(w, 2, 4, 2, ' ', 0)
	fmt.Fprintf(tw, "variable\tstate\tprobability\t%.0f%% interval\n", 100*r.GetConfidence())
	for _, t := range q.GetTargets() {
		states := r.GetMarginals()[t].GetStates()
		names := order[t]
		if len(names) != len(states) {
			names = slices.Sorted(maps.Keys(states))
		}
		for _, s := range names {
			iv := states[s]
			span := interval(sampling.Interval{P: iv.GetP(), Lo: iv.GetLo(), Hi: iv.GetHi()}, exact)
			fmt.Fprintf(tw, "%s\t%s\t%s\t%s\n", t, s, prob(iv.GetP()), span)
		}
	}
	if err := tw.Flush(); err != nil {
		return err
	}
	fmt.Fprintln(w, shortCaution)
	return nil
}
