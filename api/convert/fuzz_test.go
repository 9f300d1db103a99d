package convert

import (
	"testing"

	beliefv1 "github.com/beliefd/beliefd/proto/belief/v1"
	"github.com/beliefd/beliefd/service/examples"
	"github.com/beliefd/beliefd/service/model"
	"google.golang.org/protobuf/proto"
)

// FuzzModelMessage: any model message a gRPC client can send converts to
// a document and back to an equal message, without panicking.
//
//	go test -run '^$' -fuzz FuzzModelMessage ./api/convert/
func FuzzModelMessage(f *testing.F) {
	for _, name := range examples.Names() {
		raw, err := examples.Raw(name)
		if err != nil {
			f.Fatal(err)
		}
		doc, err := model.DecodeBytes(raw)
		if err != nil {
			f.Fatal(err)
		}
		m, err := ModelToProto(doc)
		if err != nil {
			f.Fatal(err)
		}
		b, err := proto.Marshal(m)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(b)
	}
	m, _ := ModelToProto(everyKind())
	b, _ := proto.Marshal(m)
	f.Add(b)
	f.Fuzz(func(t *testing.T, data []byte) {
		var in beliefv1.Model
		// Fields this version does not know have no document form.
		if (proto.UnmarshalOptions{DiscardUnknown: true}).Unmarshal(data, &in) != nil {
			return
		}
		out, err := ModelToProto(ModelFromProto(&in))
		if err != nil {
			t.Fatalf("a message's document has no message form: %v", err)
		}
		if !proto.Equal(&in, out) {
			t.Fatalf("round trip changed the model:\n in %v\nout %v", &in, out)
		}
	})
}

// FuzzQueryMessage: any query message converts to a document and back to
// an equal message.
//
//	go test -run '^$' -fuzz FuzzQueryMessage ./api/convert/
func FuzzQueryMessage(f *testing.F) {
	seed := uint64(7)
	b, _ := proto.Marshal(&beliefv1.Query{Model: "m@2", Evidence: map[string]string{"a": "b"},
		SoftEvidence: map[string]*beliefv1.Likelihood{"c": {Values: []float64{0.1, 1}}}, Targets: []string{"d"},
		Method: "gibbs", Mpe: true, Stop: &beliefv1.StopRule{MaxSamples: 10, Timeout: "1s", AbsErr: 0.1, RelErr: 0.2, Confidence: 0.9},
		Seed: &seed, Priority: "low", IdempotencyKey: "k"})
	f.Add(b)
	f.Fuzz(func(t *testing.T, data []byte) {
		var in beliefv1.Query
		// Fields this version does not know have no document form.
		if (proto.UnmarshalOptions{DiscardUnknown: true}).Unmarshal(data, &in) != nil {
			return
		}
		out := QueryToProto(QueryFromProto(&in))
		// An all-zero stop rule is the same as none.
		if in.Stop != nil && proto.Equal(in.Stop, &beliefv1.StopRule{}) {
			in.Stop = nil
		}
		if !proto.Equal(&in, out) {
			t.Fatalf("round trip changed the query:\n in %v\nout %v", &in, out)
		}
	})
}
