package standing_test

import (
	"testing"

	"github.com/beliefd/beliefd/service/standing"
	"github.com/beliefd/beliefd/service/standing/standingtest"
)

func TestMemoryStoreConformance(t *testing.T) {
	standingtest.Run(t, func(t *testing.T) standing.Store { return standing.NewMemoryStore() })
}
