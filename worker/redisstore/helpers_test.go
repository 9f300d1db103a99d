package redisstore

import (
	"context"
	"testing"
	"time"

	"github.com/beliefd/beliefd/worker/redisstore/redistest"
)

// testSkew is the skew margin of test stores: small, so that expired
// leases are reclaimed soon, yet wide enough for a busy test machine to
// take the next step of a test before a short lease is claimable.
const testSkew = 100 * time.Millisecond

// newStore connects a Store with a key prefix of its own to url; it is
// closed when the test ends. opt.SkewMargin defaults to testSkew.
func newStore(t testing.TB, url string, opt Options) *Store {
	t.Helper()
	if opt.KeyPrefix == "" {
		opt.KeyPrefix = redistest.KeyPrefix(t, url)
	}
	if opt.SkewMargin == 0 {
		opt.SkewMargin = testSkew
	}
	ctx, cancel := context.WithTimeout(context.Background(), 10*time.Second)
	defer cancel()
	s, err := New(ctx, url, opt)
	if err != nil {
		t.Fatalf("New(%s): %v", url, err)
	}
	t.Cleanup(func() { _ = s.Close() })
	return s
}

func ctxFor(t testing.TB) context.Context {
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	t.Cleanup(cancel)
	return ctx
}
