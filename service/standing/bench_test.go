package standing_test

import (
	"context"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/standing"
)

// BenchmarkUpdateToResult measures one alarm change through the standing
// service (UpdateEvidence, which checks the evidence, then the Step that
// recomputes it and stores the result) side by side with the bare
// synchronous query of the same evidence, on the example model with the
// memory store. The ratio is the cost of the standing-query machinery per
// change:
//
//	go test -run '^$' -bench UpdateToResult -benchtime 2000x -count 3 ./service/standing/
func BenchmarkUpdateToResult(b *testing.B) {
	t := &testing.T{}
	f := newFixture(t)
	s := f.service(t, "bench", nil, func(c *standing.Config) { c.DefaultInterval = time.Hour })
	ctx := context.Background()
	if _, err := s.Create(ctx, powerSpec("power")); err != nil {
		b.Fatal(err)
	}
	if _, err := s.Step(ctx); err != nil {
		b.Fatal(err)
	}
	states := []string{"firing", "quiet"}
	var query, standingPath time.Duration
	for i := 0; b.Loop(); i++ {
		ev := map[string]string{"alarm_power_bus": "firing", "alarm_switch_ping": states[i%2]}
		start := time.Now()
		if _, err := f.eng.Service.Query(ctx, &infer.Query{Model: example, Evidence: ev, Targets: []string{"site_power", "utility_feed", "core_network"}}); err != nil {
			b.Fatal(err)
		}
		query += time.Since(start)
		start = time.Now()
		if _, err := s.UpdateEvidence(ctx, "power", &standing.Update{Set: map[string]string{"alarm_switch_ping": states[i%2]}}); err != nil {
			b.Fatal(err)
		}
		if n, err := s.Step(ctx); err != nil || n != 1 {
			b.Fatalf("step: %d, %v", n, err)
		}
		standingPath += time.Since(start)
	}
	b.ReportMetric(float64(query.Microseconds())/float64(b.N), "query-us/op")
	b.ReportMetric(float64(standingPath.Microseconds())/float64(b.N), "standing-us/op")
	b.ReportMetric(float64(standingPath)/float64(query), "standing/query")
}
