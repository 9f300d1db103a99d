package sampling

import (
	"context"
	"encoding/json"
	"errors"
	"math/rand/v2"
	"strings"
	"sync"
	"sync/atomic"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/model"
)

type methodCase struct {
	method string
	ev     *model.Evidence
}

// methodCases gives each sampler on the chest clinic, with evidence where
// the method takes it (hard and soft).
func methodCases(t *testing.T, net *model.Network) []methodCase {
	ev := resolve(t, net, map[string]string{"xray": "yes"}, map[string][]float64{"dysp": {0.3, 0.9}})
	return []methodCase{{MethodForward, nil}, {MethodRejection, ev}, {MethodLikelihoodWeighting, ev}}
}

// The same seed gives the same bits with 1, 2 or 8 workers, whether the
// run ends at max_samples (with a short last block) or at a precision rule.
func TestDeterministicAcrossWorkers(t *testing.T) {
	net := chestClinic(t)
	for _, c := range methodCases(t, net) {
		for _, stop := range []Stop{{MaxSamples: 20*512 + 77}, {AbsErr: 0.02}} {
			var first *Estimate
			for _, workers := range []int{1, 2, 8} {
				est := mustRun(t, net, c.ev, nil, Options{Method: c.method, Seed: 42, Workers: workers, BlockSize: 512, Stop: stop})
				if first == nil {
					first = est
					if stop.MaxSamples > 0 && est.Samples != stop.MaxSamples {
						t.Fatalf("%s: %d samples, want %d", c.method, est.Samples, stop.MaxSamples)
					}
					continue
				}
				sameEstimate(t, c.method+" workers", first, est)
			}
		}
	}
}

// Blocks computed anywhere (here: in shuffled order, concurrently, and
// passed through JSON as a store would keep them) and merged in block order
// give the estimate Run gives.
func TestBlocksMergeLikeRun(t *testing.T) {
	net := chestClinic(t)
	for _, c := range methodCases(t, net) {
		const bs, total = 300, 20*300 + 50
		want := mustRun(t, net, c.ev, nil, Options{Method: c.method, Seed: 9, Workers: 2, BlockSize: bs, Stop: Stop{MaxSamples: total}})
		k, err := NewKernel(net, c.ev, c.method, nil)
		if err != nil {
			t.Fatal(err)
		}
		nb := NumBlocks(total, bs)
		stored := make([][]byte, nb)
		order := rand.New(rand.NewPCG(1, 2)).Perm(int(nb))
		var wg sync.WaitGroup
		for _, b := range order {
			wg.Add(1)
			go func() {
				defer wg.Done()
				st := k.NewStats()
				k.RunBlock(9, int64(b), BlockLen(int64(b), bs, total), st)
				data, err := json.Marshal(st)
				if err != nil {
					t.Error(err)
				}
				stored[b] = data
			}()
		}
		wg.Wait()
		merged := k.NewStats()
		for b := range nb {
			var st Stats
			if err := json.Unmarshal(stored[b], &st); err != nil {
				t.Fatal(err)
			}
			if err := k.CheckLayout(&st); err != nil {
				t.Fatal(err)
			}
			if err := merged.Merge(&st); err != nil {
				t.Fatal(err)
			}
		}
		if merged.Blocks != nb || merged.N != total {
			t.Errorf("%s: merged %d blocks, %d samples", c.method, merged.Blocks, merged.N)
		}
		got := k.Summarize(merged, Stop{})
		got.Seed, got.StopReason = 9, k.StopReason(merged, Stop{MaxSamples: total})
		sameEstimate(t, c.method+" stored blocks", want, got)
	}
}

// Blocks that finish in reverse order inside Run change nothing.
func TestDeterministicWhateverTheFinishingOrder(t *testing.T) {
	net := chestClinic(t)
	ev := resolve(t, net, map[string]string{"xray": "yes"}, nil)
	opt := Options{Method: MethodLikelihoodWeighting, Seed: 4, Workers: 4, BlockSize: 256, Stop: Stop{MaxSamples: 16 * 256}}
	want := mustRun(t, net, ev, nil, opt)
	testHookBlock = func(b int64) {
		// Earlier blocks of each batch of four sleep longer.
		time.Sleep(time.Duration(4-b%4) * time.Millisecond)
	}
	defer func() { testHookBlock = nil }()
	got := mustRun(t, net, ev, nil, opt)
	sameEstimate(t, "reversed finishing order", want, got)
}

func TestStopReasons(t *testing.T) {
	net := chestClinic(t)
	ev := resolve(t, net, chestHard, nil)

	est := mustRun(t, net, nil, nil, Options{Method: MethodForward, Seed: 1, Stop: Stop{MaxSamples: 10_001}})
	if est.StopReason != ReasonMaxSamples || est.Samples != 10_001 {
		t.Errorf("max_samples: reason %q, %d samples", est.StopReason, est.Samples)
	}

	est = mustRun(t, net, nil, nil, Options{Method: MethodForward, Seed: 1, BlockSize: 1024, Stop: Stop{AbsErr: 0.01}})
	if est.StopReason != ReasonAbsErr {
		t.Errorf("abs_err: reason %q", est.StopReason)
	}
	for _, m := range est.Marginals {
		for _, iv := range m {
			if iv.HalfWidth() > 0.01 {
				t.Errorf("abs_err: half-width %v", iv.HalfWidth())
			}
		}
	}
	// p(1-p)z²/h² at p = 0.5 bounds the samples needed: 9604 for h = 0.01;
	// the run stops at the first block boundary past the need.
	if est.Samples > 9604+1024 {
		t.Errorf("abs_err: %d samples, more than needed", est.Samples)
	}

	est = mustRun(t, net, ev, nil, Options{Method: MethodLikelihoodWeighting, Seed: 1, BlockSize: 1024, Stop: Stop{RelErr: 0.05}})
	if est.StopReason != ReasonRelErr {
		t.Errorf("rel_err: reason %q", est.StopReason)
	}
	if hw := est.Evidence.HalfWidth(); hw > 0.05*est.Evidence.P {
		t.Errorf("rel_err: P(evidence) half-width %v for %v", hw, est.Evidence.P)
	}

	// A precision that cannot be met ends at max_samples.
	est = mustRun(t, net, ev, nil, Options{Method: MethodRejection, Seed: 1, Stop: Stop{MaxSamples: 5000, AbsErr: 1e-6}})
	if est.StopReason != ReasonMaxSamples || est.Samples != 5000 {
		t.Errorf("unmet precision: reason %q, %d samples", est.StopReason, est.Samples)
	}
}

// Precision stops do not run far past the stopping block: at most two
// blocks per worker are handed out beyond the merged prefix.
func TestBoundedLookAhead(t *testing.T) {
	net := chestClinic(t)
	var started atomic.Int64
	testHookBlock = func(int64) { started.Add(1) }
	defer func() { testHookBlock = nil }()
	const workers, bs = 3, 512
	est := mustRun(t, net, nil, nil, Options{Method: MethodForward, Seed: 2, Workers: workers, BlockSize: bs, Stop: Stop{AbsErr: 0.02}})
	merged := est.Samples / bs
	if est.StopReason != ReasonAbsErr || est.Samples%bs != 0 {
		t.Fatalf("reason %q, %d samples", est.StopReason, est.Samples)
	}
	if s := started.Load(); s > merged+2*workers {
		t.Errorf("started %d blocks for %d merged", s, merged)
	}
}

func TestCancellationReturnsPartialEstimate(t *testing.T) {
	net := testnets.MustCompile(benchModelList()[1].doc)
	ctx, cancel := context.WithCancel(context.Background())
	defer cancel()
	var calls int
	est, err := Run(ctx, net, nil, nil, Options{
		Method: MethodForward, Seed: 1, BlockSize: 256, ProgressEvery: time.Millisecond,
		Stop: Stop{MaxSamples: HardMaxSamples},
		Progress: func(p *Estimate) {
			calls++
			if p.Samples <= 0 || p.StopReason != "" {
				t.Errorf("progress with %d samples, reason %q", p.Samples, p.StopReason)
			}
			cancel()
		},
	})
	if err != nil {
		t.Fatal(err)
	}
	if est.StopReason != ReasonCancelled || calls != 1 {
		t.Errorf("reason %q after %d progress calls", est.StopReason, calls)
	}
	if est.Samples <= 0 || est.Samples%256 != 0 || est.Samples >= HardMaxSamples {
		t.Errorf("partial estimate with %d samples", est.Samples)
	}
	noNaN(t, est)

	// Cancelled before the start: no samples, a warning, no NaN.
	done, stop := context.WithCancel(context.Background())
	stop()
	est, err = Run(done, net, nil, nil, Options{Method: MethodForward})
	if err != nil {
		t.Fatal(err)
	}
	if est.StopReason != ReasonCancelled || est.Samples != 0 || len(est.Warnings) == 0 {
		t.Errorf("pre-cancelled: reason %q, %d samples, warnings %q", est.StopReason, est.Samples, est.Warnings)
	}
	noNaN(t, est)
}

func TestTimeout(t *testing.T) {
	net := testnets.MustCompile(benchModelList()[1].doc)
	est := mustRun(t, net, nil, nil, Options{Method: MethodForward, Seed: 1, Stop: Stop{Timeout: 30 * time.Millisecond}})
	if est.StopReason != ReasonTimeout || est.Samples >= PrecisionMaxSamples {
		t.Errorf("reason %q, %d samples", est.StopReason, est.Samples)
	}
	if est.Elapsed < 30*time.Millisecond {
		t.Errorf("elapsed %s before the timeout", est.Elapsed)
	}
}

func TestBadInput(t *testing.T) {
	net := chestClinic(t)
	ev := resolve(t, net, chestHard, nil)
	ctx := context.Background()
	cases := []struct {
		name    string
		ev      *model.Evidence
		targets []int
		opt     Options
		want    error
		text    string
	}{
		{"forward with evidence", ev, nil, Options{Method: MethodForward}, ErrEvidenceNotSupported, `use "rejection" or "likelihood-weighting"`},
		{"unknown method", nil, nil, Options{Method: "gibbs-ish"}, ErrUnknownMethod, `"gibbs-ish"`},
		{"target out of range", nil, []int{99}, Options{Method: MethodForward}, model.ErrBadEvidence, "target index 99"},
		{"target twice", nil, []int{2, 2}, Options{Method: MethodForward}, model.ErrBadEvidence, `target "tub" listed twice`},
		{"short evidence", &model.Evidence{Hard: []int{0}, Soft: [][]float64{nil}}, nil, Options{Method: MethodRejection}, model.ErrBadEvidence, "the network has 8 variables"},
		{"bad state", &model.Evidence{Hard: []int{5, -1, -1, -1, -1, -1, -1, -1}, Soft: make([][]float64, 8)}, nil, Options{Method: MethodRejection}, model.ErrBadEvidence, `"asia" has no state 5`},
		{"bad stop", nil, nil, Options{Method: MethodForward, Stop: Stop{AbsErr: 2}}, ErrBadStop, "abs_err"},
		{"bad block size", nil, nil, Options{Method: MethodForward, BlockSize: -1}, ErrBadOptions, "block size"},
		{"bad workers", nil, nil, Options{Method: MethodForward, Workers: -2}, ErrBadOptions, "workers"},
	}
	for _, c := range cases {
		_, err := Run(ctx, net, c.ev, c.targets, c.opt)
		if !errors.Is(err, c.want) || !strings.Contains(err.Error(), c.text) {
			t.Errorf("%s: error %v, want %v mentioning %q", c.name, err, c.want, c.text)
		}
	}
	if _, err := Run(ctx, nil, nil, nil, Options{Method: MethodForward}); !errors.Is(err, model.ErrInvalid) {
		t.Errorf("nil network: %v", err)
	}
	k, err := NewKernel(net, nil, MethodForward, nil)
	if err != nil {
		t.Fatal(err)
	}
	other, err := NewKernel(net, ev, MethodLikelihoodWeighting, nil)
	if err != nil {
		t.Fatal(err)
	}
	if err := k.NewStats().Merge(other.NewStats()); !errors.Is(err, ErrStatsMismatch) {
		t.Errorf("merging different layouts: %v", err)
	}
	if err := k.CheckLayout(other.NewStats()); !errors.Is(err, ErrStatsMismatch) {
		t.Errorf("layout check: %v", err)
	}
}

// Drawing a block allocates the same whatever its size: nothing per sample.
func TestNoAllocationPerSample(t *testing.T) {
	net := chestClinic(t)
	for _, c := range methodCases(t, net) {
		k, err := NewKernel(net, c.ev, c.method, nil)
		if err != nil {
			t.Fatal(err)
		}
		st := k.NewStats()
		small := testing.AllocsPerRun(5, func() { k.RunBlock(1, 0, 10, st) })
		large := testing.AllocsPerRun(5, func() { k.RunBlock(1, 0, 5000, st) })
		if large != small {
			t.Errorf("%s: %v allocations for 10 samples, %v for 5000", c.method, small, large)
		}
	}
}

// Hard-evidence targets are known exactly, and precision rules ignore them.
func TestClampedTargetsAreExact(t *testing.T) {
	net := chestClinic(t)
	ev := resolve(t, net, chestHard, nil)
	asia := indexOf(t, net, "asia")
	for _, m := range []string{MethodRejection, MethodLikelihoodWeighting} {
		est := mustRun(t, net, ev, []int{asia, indexOf(t, net, "bronc")}, Options{Method: m, Seed: 1, Stop: Stop{RelErr: 0.2}})
		if iv := est.Marginals[0]; iv[0] != (Interval{}) || iv[1] != (Interval{P: 1, Lo: 1, Hi: 1}) {
			t.Errorf("%s: asia = yes observed, marginal %+v", m, iv)
		}
		if est.StopReason != ReasonRelErr {
			t.Errorf("%s: reason %q", m, est.StopReason)
		}
	}
}
