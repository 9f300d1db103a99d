package main

import (
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"io"
	"net/http"
	"os"
	"os/exec"
	"strconv"
	"strings"
	"time"
)

func cmdScale(ctx context.Context, args []string, stdout io.Writer) error {
	fs := flag.NewFlagSet("scale", flag.ContinueOnError)
	fs.SetOutput(stdout)
	base := fs.String("url", "", "measure the deployment behind this API URL as it is (default: start local clusters)")
	workerList := fs.String("workers", "1,2,4", "worker processes (each --workers 1) of the local clusters, comma-separated")
	vars := fs.Int("vars", 300, "variables of the generated model")
	samples := fs.Int64("samples", 4_000_000, "max_samples of the measured job")
	seed := fs.Uint64("seed", 1, "seed of the model and of the job")
	timeout := fs.Duration("timeout", 10*time.Minute, "longest wait for one run")
	beliefd := fs.String("beliefd", "beliefd", "beliefd binary for local clusters (go build -o beliefd ./cmd/beliefd)")
	redisServer := fs.String("redis-server", "redis-server", "redis-server binary for local clusters")
	allowRemote := fs.Bool("allow-remote", false, "allow a --url that is not a loopback address")
	writeModel := fs.String("write-model", "", "write the generated model document to this file, print the job's query and exit (to time `beliefd run` on the same job)")
	if err := fs.Parse(args); err != nil {
		return err
	}
	switch {
	case fs.NArg() > 0:
		return fmt.Errorf("%w: unexpected argument %q", errUsage, fs.Arg(0))
	case *vars < 10 || *vars > 100_000:
		return fmt.Errorf("%w: --vars %d: want 10 to 100000", errUsage, *vars)
	case *samples < 8192:
		return fmt.Errorf("%w: --samples %d: want at least 8192 (one block)", errUsage, *samples)
	case *timeout <= 0 || *timeout > 24*time.Hour:
		return fmt.Errorf("%w: --timeout %s: want more than 0 and at most 24h", errUsage, *timeout)
	}
	doc := randomModel(*vars, *seed)
	raw, err := json.Marshal(doc)
	if err != nil {
		return err
	}
	query, err := scaleQuery(doc, *samples, *seed)
	if err != nil {
		return err
	}
	if *writeModel != "" {
		if err := os.WriteFile(*writeModel, raw, 0o644); err != nil {
			return err
		}
		fmt.Fprintf(stdout, "%s\n", query)
		return nil
	}
	fmt.Fprintf(stdout, "model %s (%d variables, seed %d); one likelihood-weighting job of %d samples (%d blocks of 8192)\n",
		doc.Name, *vars, *seed, *samples, (*samples+8191)/8192)
	fmt.Fprintf(stdout, "%-8s %12s %9s %12s %14s %8s %14s\n", "workers", "samples", "seconds", "samples/s", "steady/s", "speedup", "redis cmds/blk")
	if *base != "" {
		if err := checkTarget(*base, *allowRemote); err != nil {
			return err
		}
		m, err := measure(ctx, newClient(*base, 2), raw, query, *timeout)
		if err != nil {
			return err
		}
		m.print(stdout, "as-is", 0)
		return nil
	}
	var counts []int
	for _, f := range strings.Split(*workerList, ",") {
		n, err := strconv.Atoi(strings.TrimSpace(f))
		if err != nil || n < 1 || n > 256 {
			return fmt.Errorf("%w: --workers %q: want counts from 1 to 256, comma-separated", errUsage, *workerList)
		}
		counts = append(counts, n)
	}
	for _, bin := range []*string{beliefd, redisServer} {
		p, err := exec.LookPath(*bin)
		if err != nil {
			return fmt.Errorf("%s: %w", *bin, err)
		}
		*bin = p
	}
	first := 0.0
	for _, n := range counts {
		lc, err := startLocalCluster(ctx, *beliefd, *redisServer, n)
		if err != nil {
			return err
		}
		before, err := lc.commands(ctx)
		if err != nil {
			lc.stop()
			return fmt.Errorf("%d workers: redis: %w", n, err)
		}
		m, err := measure(ctx, newClient(lc.base, 2), raw, query, *timeout)
		if err == nil {
			var after int64
			if after, err = lc.commands(ctx); err == nil {
				// Includes the model upload, submission and this
				// program's polls: a few dozen commands in all.
				m.commandsPerBlock = float64(after-before) / float64((m.samples+8191)/8192)
			}
		}
		lc.stop()
		if err != nil {
			return fmt.Errorf("%d workers: %w", n, err)
		}
		if first == 0 {
			first = m.rate()
		}
		m.print(stdout, strconv.Itoa(n), first)
	}
	return nil
}

// measurement is one measured job.
type measurement struct {
	samples int64
	elapsed time.Duration // job started_at to finished_at, server clock
	steady  float64       // samples/s between 10% and 90% of the samples, client clock
	// commandsPerBlock is the Redis commands per block of 8192 samples
	// (local clusters only; 0 when not measured).
	commandsPerBlock float64
}

func (m *measurement) rate() float64 { return float64(m.samples) / m.elapsed.Seconds() }

func (m *measurement) print(w io.Writer, label string, first float64) {
	speedup := "-"
	if first > 0 {
		speedup = fmt.Sprintf("%.2fx", m.rate()/first)
	}
	cmds := "-"
	if m.commandsPerBlock > 0 {
		cmds = fmt.Sprintf("%.1f", m.commandsPerBlock)
	}
	fmt.Fprintf(w, "%-8s %12d %9.2f %12.0f %14.0f %8s %14s\n", label, m.samples, m.elapsed.Seconds(), m.rate(), m.steady, speedup, cmds)
}

// measure stores the model, runs the job and times it: the whole job from
// its started_at to its finished_at, and the steady rate from the partial
// results (refreshed at least every second) between 10% and 90% of the
// samples.
func measure(ctx context.Context, c *client, doc, query []byte, timeout time.Duration) (*measurement, error) {
	if status, _, err := c.do("GET", "/readyz", nil); err != nil || status != http.StatusOK {
		return nil, fmt.Errorf("%s/readyz: status %d, %v", c.base, status, err)
	}
	if err := c.putModel(doc); err != nil {
		return nil, err
	}
	id, err := c.submit(query)
	if err != nil {
		return nil, err
	}
	var want struct {
		Stop struct {
			MaxSamples int64 `json:"max_samples"`
		} `json:"stop"`
	}
	_ = json.Unmarshal(query, &want)
	lo, hi := want.Stop.MaxSamples/10, want.Stop.MaxSamples*9/10
	var t0, t1 time.Time
	var s0, s1 int64
	deadline := time.Now().Add(timeout)
	for {
		v, err := c.getJob(id)
		if err != nil {
			return nil, err
		}
		now := time.Now()
		if v.Samples >= lo && t0.IsZero() {
			t0, s0 = now, v.Samples
		}
		if v.Samples <= hi && !t0.IsZero() {
			t1, s1 = now, v.Samples
		}
		if v.ended() {
			if v.State != "succeeded" {
				return nil, fmt.Errorf("job %s %s: %s", id, v.State, v.Job.Error)
			}
			m := &measurement{samples: v.Samples, elapsed: v.Job.FinishedAt.Sub(v.Job.StartedAt)}
			if t1.After(t0) && s1 > s0 {
				m.steady = float64(s1-s0) / t1.Sub(t0).Seconds()
			}
			return m, nil
		}
		if now.After(deadline) {
			return nil, fmt.Errorf("job %s not finished within %s (%d samples so far)", id, timeout, v.Samples)
		}
		select {
		case <-ctx.Done():
			c.do("POST", "/v1/jobs/"+id+"/cancel", nil)
			return nil, ctx.Err()
		case <-time.After(200 * time.Millisecond):
		}
	}
}
