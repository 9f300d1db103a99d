package redisstore

import (
	"testing"

	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/jobstest"
	"github.com/beliefd/beliefd/worker/redisstore/redistest"
)

// TestConformance runs the suite every jobs.Store backend passes, each
// subtest on an empty key space of one shared server.
func TestConformance(t *testing.T) {
	url := redistest.Start(t)
	jobstest.Run(t, func(t *testing.T) jobs.Store {
		return newStore(t, url, Options{})
	})
}
