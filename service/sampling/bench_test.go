package sampling

// Speed of the sampling core.
//
//	go test -run '^$' -bench . ./service/sampling/
//
// reports ns/node-sample (nanoseconds per variable per sample, one
// goroutine) for forward sampling and likelihood weighting on a 40-variable
// and a 1000-variable random network (BenchmarkForward*, BenchmarkLW*), and
// the wall time of Run with one and two workers (BenchmarkRun*): the
// 2-goroutine speedup is workers=1 over workers=2. On a shared machine take
// the best of several runs (-count).
//
// Comparing with the C yardstick in shared/bench (same models, same
// evidence, same machine, same session):
//
//	dir=$(mktemp -d)
//	go test -run '^$' ./service/sampling/ -args -benchmodels=$dir   # writes $dir/bench40.json, $dir/bench1000.json, $dir/*.evidence
//	gcc -O3 -march=native -o $dir/ref ../shared/bench/ref_sampler.c -lm
//	for m in bench40 bench1000; do
//	  python3 ../shared/bench/net2txt.py $dir/$m.json > $dir/$m.txt
//	  python3 ../shared/bench/net2txt.py $dir/$m.json "$(cat $dir/$m.evidence)" > $dir/$m.e.txt
//	  $dir/ref $dir/$m.txt 20000000; $dir/ref $dir/$m.e.txt 20000000
//	done
//
// and divide the Go ns/node-sample by the C one. The benchmarks count every
// variable (all are targets), as the yardstick does.

import (
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"math/rand/v2"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/model"
)

var benchModels = flag.String("benchmodels", "", "write the benchmark model documents and their evidence to this directory")

func TestMain(m *testing.M) {
	flag.Parse()
	if *benchModels != "" {
		if err := writeBenchModels(*benchModels); err != nil {
			fmt.Fprintln(os.Stderr, err)
			os.Exit(1)
		}
	}
	os.Exit(m.Run())
}

// benchModel is a benchmark network with the hard evidence used for
// likelihood weighting.
type benchModel struct {
	name     string
	doc      *model.Document
	evidence map[string]string
}

func benchModelList() []benchModel {
	return []benchModel{
		{
			name:     "bench40",
			doc:      testnets.Random(rand.New(rand.NewPCG(40, 1)), testnets.RandomOptions{Vars: 40, MaxParents: 3, MaxStates: 3}),
			evidence: map[string]string{"v20": "s0", "v39": "s0"},
		},
		{
			name:     "bench1000",
			doc:      testnets.Random(rand.New(rand.NewPCG(1000, 1)), testnets.RandomOptions{Vars: 1000, Window: 30, MaxParents: 3, MaxStates: 3}),
			evidence: map[string]string{"v300": "s0", "v600": "s0", "v999": "s0"},
		},
	}
}

func writeBenchModels(dir string) error {
	for _, bm := range benchModelList() {
		// The yardstick's converter wants "parents" on every variable,
		// which model.Document omits when empty.
		type variable struct {
			Name    string      `json:"name"`
			States  []string    `json:"states"`
			Parents []string    `json:"parents"`
			Table   [][]float64 `json:"table"`
		}
		vars := make([]variable, len(bm.doc.Variables))
		for i, v := range bm.doc.Variables {
			vars[i] = variable{Name: v.Name, States: v.States, Parents: append([]string{}, v.Parents...), Table: v.Table}
		}
		data, err := json.Marshal(map[string]any{"name": bm.doc.Name, "variables": vars})
		if err != nil {
			return err
		}
		if err := os.WriteFile(filepath.Join(dir, bm.name+".json"), data, 0o644); err != nil {
			return err
		}
		var kv []string
		for k, v := range bm.evidence {
			kv = append(kv, k+"="+v)
		}
		if err := os.WriteFile(filepath.Join(dir, bm.name+".evidence"), []byte(strings.Join(kv, ",")), 0o644); err != nil {
			return err
		}
	}
	return nil
}

func allVars(net *model.Network) []int {
	t := make([]int, len(net.Vars))
	for i := range t {
		t[i] = i
	}
	return t
}

func benchKernel(b *testing.B, bm benchModel, method string) {
	net := testnets.MustCompile(bm.doc)
	ev := net.NoEvidence()
	if method == MethodLikelihoodWeighting {
		var err error
		if ev, err = net.ResolveEvidence(bm.evidence, nil); err != nil {
			b.Fatal(err)
		}
	}
	k, err := NewKernel(net, ev, method, allVars(net))
	if err != nil {
		b.Fatal(err)
	}
	st := k.NewStats()
	const block = DefaultBlockSize
	b.ResetTimer()
	for i := 0; b.Loop(); i++ {
		k.RunBlock(7, int64(i), block, st)
	}
	b.ReportMetric(float64(b.Elapsed().Nanoseconds())/(float64(b.N)*block*float64(len(net.Vars))), "ns/node-sample")
}

func BenchmarkForward40(b *testing.B)   { benchKernel(b, benchModelList()[0], MethodForward) }
func BenchmarkForward1000(b *testing.B) { benchKernel(b, benchModelList()[1], MethodForward) }
func BenchmarkLW40(b *testing.B)        { benchKernel(b, benchModelList()[0], MethodLikelihoodWeighting) }
func BenchmarkLW1000(b *testing.B)      { benchKernel(b, benchModelList()[1], MethodLikelihoodWeighting) }

// benchWorkers times Run on the 1000-variable network with one and with
// two workers; the 2-goroutine speedup is the ratio of the two
// ns/node-sample figures (wall time per variable per sample).
func benchWorkers(b *testing.B, method string) {
	bm := benchModelList()[1]
	net := testnets.MustCompile(bm.doc)
	ev := net.NoEvidence()
	if method == MethodLikelihoodWeighting {
		var err error
		if ev, err = net.ResolveEvidence(bm.evidence, nil); err != nil {
			b.Fatal(err)
		}
	}
	targets := allVars(net)
	const samples = 16 * DefaultBlockSize
	for _, workers := range []int{1, 2} {
		b.Run(fmt.Sprintf("workers=%d", workers), func(b *testing.B) {
			for b.Loop() {
				_, err := Run(context.Background(), net, ev, targets, Options{Method: method, Seed: 3, Workers: workers,
					Stop: Stop{MaxSamples: samples}})
				if err != nil {
					b.Fatal(err)
				}
			}
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/(float64(b.N)*samples*float64(len(net.Vars))), "ns/node-sample")
		})
	}
}

func BenchmarkRunForward1000(b *testing.B) { benchWorkers(b, MethodForward) }
func BenchmarkRunLW1000(b *testing.B)      { benchWorkers(b, MethodLikelihoodWeighting) }
