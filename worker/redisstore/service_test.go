package redisstore

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"log/slog"
	"sync"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/examples"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/jobstest"
	"github.com/beliefd/beliefd/worker/redisstore/redistest"
)

// canonicalResult is the JSON of a result without what depends on the
// clock or the job (elapsed time, job state).
func canonicalResult(t *testing.T, r *infer.Result) string {
	t.Helper()
	data, err := json.Marshal(r)
	if err != nil {
		t.Fatal(err)
	}
	var m map[string]any
	if err := json.Unmarshal(data, &m); err != nil {
		t.Fatal(err)
	}
	delete(m, "elapsed_seconds")
	delete(m, "state")
	var buf bytes.Buffer
	enc := json.NewEncoder(&buf)
	enc.SetIndent("", " ")
	if err := enc.Encode(m); err != nil {
		t.Fatal(err)
	}
	return buf.String()
}

// TestServiceOverRedis runs a sampling job through the job service with
// an API process and two worker processes, each with a Store of its own,
// and checks the determinism contract: the final result equals what
// infer.Runner (the engine of `beliefd run`) gives for the same query and
// seed, bit for bit.
func TestServiceOverRedis(t *testing.T) {
	serviceOverRedis(t, redistest.Start(t), false)
}

func serviceOverRedis(t *testing.T, url string, cluster bool) {
	prefix := redistest.KeyPrefix(t, url)
	ctx, cancel := context.WithTimeout(context.Background(), 2*time.Minute)
	defer cancel()
	quiet := slog.New(slog.NewTextHandler(io.Discard, nil))
	var apiStore *Store
	newSvc := func() *jobs.Service {
		st := newStore(t, url, Options{KeyPrefix: prefix, Logger: quiet, Cluster: cluster})
		if apiStore == nil {
			apiStore = st
		}
		svc, err := jobs.NewService(st, jobs.Config{LeaseTime: 5 * time.Second, Logger: quiet}, nil)
		if err != nil {
			t.Fatal(err)
		}
		return svc
	}
	api, workers := newSvc(), []*jobs.Service{newSvc(), newSvc()}

	const example = "tarnwick-platform"
	raw, err := examples.Raw(example)
	if err != nil {
		t.Fatal(err)
	}
	_, net, err := examples.Load(example)
	if err != nil {
		t.Fatal(err)
	}
	info, _, err := api.PutModel(ctx, raw)
	if err != nil {
		t.Fatal(err)
	}
	seed := uint64(20310506)
	q := infer.Query{
		Model: info.Name, Method: infer.MethodLikelihoodWeighting,
		Evidence: map[string]string{"alarm_checkout_5xx": "firing"},
		Stop:     infer.StopRule{MaxSamples: 24 * 8192}, Seed: &seed,
	}
	sub := q
	j, created, err := api.Submit(ctx, &sub)
	if err != nil || !created {
		t.Fatalf("Submit: created %v, %v", created, err)
	}

	done := make(chan struct{})
	var wg sync.WaitGroup
	errs := make(chan error, 4)
	for i, w := range workers {
		for g := range 2 {
			wg.Add(1)
			go func() {
				defer wg.Done()
				name := fmt.Sprintf("proc%d-%d", i, g)
				for {
					select {
					case <-done:
						return
					default:
					}
					worked, err := w.RunOnce(ctx, name)
					if err != nil {
						errs <- err
						return
					}
					if !worked {
						time.Sleep(5 * time.Millisecond)
					}
				}
			}()
		}
	}
	var final *jobs.Job
	jobstest.Eventually(t, 90*time.Second, "the job finishes", func() bool {
		final, err = api.Get(ctx, j.ID)
		return err == nil && final.State.Terminal()
	})
	close(done)
	wg.Wait()
	close(errs)
	for err := range errs {
		t.Fatalf("RunOnce: %v", err)
	}
	if final.State != jobs.StateSucceeded || final.Result == nil {
		t.Fatalf("job ended %s (%s)", final.State, final.Error)
	}
	ref, err := infer.NewRunner(infer.Options{Workers: 2}).Run(ctx, net, &q, nil)
	if err != nil {
		t.Fatal(err)
	}
	if got, want := canonicalResult(t, final.Result), canonicalResult(t, ref); got != want {
		t.Fatalf("result over Redis differs from infer.Runner's:\n got %s\nwant %s", got, want)
	}
	if q, r, err := apiStore.Unfinished(ctx); err != nil || q+r != 0 {
		t.Fatalf("Unfinished after the job = %d, %d, %v; want 0, 0", q, r, err)
	}
}
