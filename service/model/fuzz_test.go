package model_test

import (
	"encoding/json"
	"errors"
	"testing"

	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/model"
)

// FuzzDecodeCompile feeds arbitrary bytes to the decoder and compiler: they
// must return a document or an error wrapping the package's sentinels, and
// never panic.
func FuzzDecodeCompile(f *testing.F) {
	cc, _ := json.Marshal(testnets.ChestClinic())
	f.Add(cc)
	f.Add([]byte(`{"name":"m","variables":[{"name":"x","states":["ok","failed"],"table":[[0.9,0.1]]}]}`))
	f.Add([]byte(`{"variables":[{"name":"a","states":["ok","failed"],"parents":["b"],"gate":{"type":"any_of"}},{"name":"b","states":["ok","failed"],"parents":["a"],"gate":{"type":"all_of"}}]}`))
	f.Add([]byte(`{"variables":[{"name":"r","states":["ok","failed"],"failure_rate":{"lambda":1e-5,"mission_time":100}},{"name":"y","states":["a","b","c"],"parents":["r"],"noisy_max":{"leak":[1,0,0],"links":{"r":{"failed":[0.1,0.2,0.7]}}}}]}`))
	f.Add([]byte(`[]`))
	f.Fuzz(func(t *testing.T, data []byte) {
		doc, err := model.DecodeBytes(data)
		if err != nil {
			if !errors.Is(err, model.ErrMalformed) {
				t.Fatalf("decode error without ErrMalformed: %v", err)
			}
			return
		}
		net, err := model.Compile(doc, model.Limits{MaxTableEntries: 1 << 16})
		if err != nil {
			if !errors.Is(err, model.ErrInvalid) {
				t.Fatalf("compile error without ErrInvalid: %v", err)
			}
			return
		}
		for i := range net.Vars {
			n := &net.Vars[i]
			if len(n.CPT) != n.Rows*n.Card() {
				t.Fatalf("%s: table of %d entries, want %d", n.Name, len(n.CPT), n.Rows*n.Card())
			}
			for _, p := range n.Parents {
				if p >= i {
					t.Fatalf("%s: parent %d not before child %d", n.Name, p, i)
				}
			}
		}
	})
}
