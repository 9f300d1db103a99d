package api_test

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"math"
	"net"
	"net/http"
	"net/http/httptest"
	"runtime"
	"strings"
	"testing"
	"time"

	"github.com/beliefd/beliefd/api/convert"
	"github.com/beliefd/beliefd/api/errmap"
	"github.com/beliefd/beliefd/api/grpcapi"
	"github.com/beliefd/beliefd/api/httpapi"
	"github.com/beliefd/beliefd/api/internal/apitest"
	"github.com/beliefd/beliefd/api/internal/leakcheck"
	beliefv1 "github.com/beliefd/beliefd/proto/belief/v1"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/jobs/memstore"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/worker"
	"google.golang.org/genproto/googleapis/rpc/errdetails"
	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/proto"
)

// Body limits of the bad-input server. They are smaller than the defaults
// so that the oversized cases stay cheap; the code paths are the same.
const (
	badMaxModelBytes = 2 << 20
	badMaxQueryBytes = 256 << 10
	badMaxGRPCBytes  = badMaxModelBytes + 64<<10
)

// requestTimeout bounds every request of the catalogue. It detects hangs
// (a request that never ends); it does not measure speed.
const requestTimeout = 30 * time.Second

// badStack is a real server: the job service over the memory store with a
// worker pool, served over loopback HTTP and gRPC, wired as `beliefd
// serve` wires it.
type badStack struct {
	base   string
	client *http.Client
	models beliefv1.ModelServiceClient
	jobs   beliefv1.JobServiceClient
	query  beliefv1.QueryServiceClient
}

func newBadStack(t *testing.T) *badStack {
	t.Helper()
	log := slog.New(slog.DiscardHandler)
	store := memstore.New(memstore.Options{})
	svc, err := jobs.NewService(store, jobs.Config{PartialEvery: 50 * time.Millisecond, Logger: log}, nil)
	if err != nil {
		t.Fatal(err)
	}
	hs := httptest.NewServer(httpapi.New(svc, httpapi.Options{Logger: log, MaxModelBytes: badMaxModelBytes, MaxQueryBytes: badMaxQueryBytes}))
	lis, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	opts := grpcapi.Options{Logger: log, MaxMessageBytes: badMaxGRPCBytes}
	gs := grpc.NewServer(grpcapi.ServerOptions(opts)...)
	grpcapi.Register(gs, svc, opts)
	served := make(chan struct{})
	go func() { defer close(served); _ = gs.Serve(lis) }()
	conn, err := grpc.NewClient(lis.Addr().String(), grpc.WithTransportCredentials(insecure.NewCredentials()),
		grpc.WithDefaultCallOptions(grpc.MaxCallRecvMsgSize(16<<20)))
	if err != nil {
		t.Fatal(err)
	}
	pool, err := worker.NewPool(svc, store, worker.Config{Workers: 2, Logger: log})
	if err != nil {
		t.Fatal(err)
	}
	poolCtx, stopPool := context.WithCancel(context.Background())
	poolDone := make(chan error, 1)
	go func() { poolDone <- pool.Run(poolCtx) }()
	s := &badStack{base: hs.URL, client: &http.Client{Timeout: requestTimeout},
		models: beliefv1.NewModelServiceClient(conn), jobs: beliefv1.NewJobServiceClient(conn), query: beliefv1.NewQueryServiceClient(conn)}
	t.Cleanup(func() {
		stopPool()
		if err := <-poolDone; err != nil && !errors.Is(err, context.Canceled) {
			t.Errorf("worker pool: %v", err)
		}
		conn.Close()
		gs.Stop()
		<-served
		s.client.CloseIdleConnections()
		hs.Close()
		store.Close()
	})
	return s
}

// badCase is one malformed request, sent over HTTP and, when it has a
// message form, over gRPC. Both must fail with a client error whose
// message contains every string of want.
type badCase struct {
	name string

	method, path string
	body         []byte
	header       []string
	status       int // the HTTP status expected

	// grpc makes the gRPC call; nil when the request has no message form
	// (JSON syntax, types and field names).
	grpc func(ctx context.Context, s *badStack) error
	code codes.Code // the gRPC code expected

	want []string
	// maxReply, when set, bounds the HTTP body and the gRPC message.
	maxReply int
}

// codeOf is the gRPC code the API gives for an HTTP status (api/doc.go).
func codeOf(status int) codes.Code {
	switch status {
	case http.StatusNotFound:
		return codes.NotFound
	case http.StatusMethodNotAllowed:
		return codes.Unimplemented
	}
	return codes.InvalidArgument
}

// modelCase sends doc to POST /v1/models and, when it decodes as a model
// document, its message form to ModelService.CreateModel.
func modelCase(name, doc string, status int, want ...string) badCase {
	c := badCase{name: "model/" + name, method: "POST", path: "/v1/models", body: []byte(doc), status: status, code: codeOf(status), want: want}
	if d, err := model.DecodeBytes([]byte(doc)); err == nil {
		if m, err := convert.ModelToProto(d); err == nil {
			c.grpc = func(ctx context.Context, s *badStack) error {
				_, err := s.models.CreateModel(ctx, &beliefv1.CreateModelRequest{Model: m})
				return err
			}
		}
	}
	return c
}

// grpcModelCase sends a model message that has no JSON form (NaN,
// infinities) to CreateModel only.
func grpcModelCase(name string, m *beliefv1.Model, want ...string) badCase {
	return badCase{name: "model/" + name, code: codes.InvalidArgument, want: want,
		grpc: func(ctx context.Context, s *badStack) error {
			_, err := s.models.CreateModel(ctx, &beliefv1.CreateModelRequest{Model: m})
			return err
		}}
}

// queryCases sends a query document to POST /v1/jobs and POST /v1/query
// and, when it decodes as a query, its message form to SubmitJob and Query.
func queryCases(name, doc string, status int, want ...string) []badCase {
	var q infer.Query
	dec := json.NewDecoder(strings.NewReader(doc))
	dec.DisallowUnknownFields()
	hasMsg := dec.Decode(&q) == nil && !dec.More()
	var out []badCase
	for _, path := range []string{"/v1/jobs", "/v1/query"} {
		c := badCase{name: "query/" + name + path, method: "POST", path: path, body: []byte(doc), status: status, code: codeOf(status), want: want}
		if hasMsg {
			m := convert.QueryToProto(&q)
			if path == "/v1/jobs" {
				c.grpc = func(ctx context.Context, s *badStack) error {
					_, err := s.jobs.SubmitJob(ctx, &beliefv1.SubmitJobRequest{Query: m})
					return err
				}
			} else {
				c.grpc = func(ctx context.Context, s *badStack) error {
					_, err := s.query.Query(ctx, &beliefv1.QueryRequest{Query: m})
					return err
				}
			}
		}
		out = append(out, c)
	}
	return out
}

// syncCases sends a query document to POST /v1/query and its message
// form to QueryService.Query only: a job of the same query is accepted and
// fails when it runs.
func syncCases(name, doc string, want ...string) []badCase {
	var out []badCase
	for _, c := range queryCases(name, doc, http.StatusBadRequest, want...) {
		if c.path == "/v1/query" {
			out = append(out, c)
		}
	}
	return out
}

// grpcQueryCases sends a query message with no JSON form to SubmitJob and Query.
func grpcQueryCases(name string, m *beliefv1.Query, want ...string) []badCase {
	return []badCase{
		{name: "query/" + name + "/SubmitJob", code: codes.InvalidArgument, want: want, grpc: func(ctx context.Context, s *badStack) error {
			_, err := s.jobs.SubmitJob(ctx, &beliefv1.SubmitJobRequest{Query: m})
			return err
		}},
		{name: "query/" + name + "/Query", code: codes.InvalidArgument, want: want, grpc: func(ctx context.Context, s *badStack) error {
			_, err := s.query.Query(ctx, &beliefv1.QueryRequest{Query: m})
			return err
		}},
	}
}

// variable is one variable of a model document in JSON.
func variable(name string, states []string, parents []string, dist string) string {
	s, _ := json.Marshal(states)
	p, _ := json.Marshal(parents)
	if parents == nil {
		p = []byte("[]")
	}
	return fmt.Sprintf(`{"name": %q, "states": %s, "parents": %s, %s}`, name, s, p, dist)
}

func doc(name string, vars ...string) string {
	return fmt.Sprintf(`{"name": %q, "variables": [%s]}`, name, strings.Join(vars, ", "))
}

var okFailed = []string{"ok", "failed"}

// root is a two-state root variable.
func root(name string) string { return variable(name, okFailed, nil, `"table": [[0.9, 0.1]]`) }

// catalogue lists the malformed requests. Each names what the message
// must mention, so that a client error which does not say what is wrong
// fails the test.
func catalogue() []badCase {
	var cs []badCase
	add := func(c ...badCase) { cs = append(cs, c...) }
	bad := http.StatusBadRequest

	// Model documents: structure.
	add(modelCase("cycle", doc("cyc", variable("a", okFailed, []string{"c"}, `"gate": {"type": "any_of"}`),
		variable("b", okFailed, []string{"a"}, `"gate": {"type": "any_of"}`),
		variable("c", okFailed, []string{"b"}, `"gate": {"type": "any_of"}`)), bad, "cycle: a -> b -> c -> a"))
	add(modelCase("own parent", doc("selfish", variable("a", okFailed, []string{"a"}, `"gate": {"type": "any_of"}`)), bad, "its own parent"))
	add(modelCase("unknown parent", doc("orphan", variable("fan", okFailed, []string{"power"}, `"table": [[0.9, 0.1], [0.5, 0.5]]`)), bad, `unknown parent "power"`))
	add(modelCase("parent twice", doc("twice", root("power"), variable("fan", okFailed, []string{"power", "power"}, `"gate": {"type": "any_of"}`)), bad, `parent "power" listed twice`))
	add(modelCase("duplicate name", doc("dup", root("fan"), root("fan")), bad, `"fan"`, "duplicate variable name"))
	add(modelCase("duplicate state", doc("dupstate", variable("fan", []string{"ok", "ok"}, nil, `"table": [[0.5, 0.5]]`)), bad, `duplicate state "ok"`))
	add(modelCase("one state", doc("single", variable("fan", []string{"ok"}, nil, `"table": [[1]]`)), bad, "at least two states"))
	add(modelCase("empty state name", doc("blank", variable("fan", []string{"ok", ""}, nil, `"table": [[0.5, 0.5]]`)), bad, "empty state name"))
	add(modelCase("no variables", `{"name": "empty", "variables": []}`, bad, "no variables"))
	add(modelCase("no distribution", doc("nodist", `{"name": "fan", "states": ["ok", "failed"]}`), bad, `"fan"`, "no distribution"))
	add(modelCase("two distributions", doc("twodist", variable("fan", okFailed, nil, `"table": [[0.9, 0.1]], "failure_rate": {"lambda": 1e-4, "mission_time": 10}`)), bad, "more than one distribution"))
	add(modelCase("empty model name", doc("", root("fan")), bad, "no name"))
	add(modelCase("model name with a slash", doc("../etc/passwd", root("fan")), bad, `"../etc/passwd"`, "only letters, digits"))
	add(modelCase("unknown fault state", doc("fault", variable("fan", okFailed, nil, `"fault_states": ["broken"], "table": [[0.9, 0.1]]`)), bad, `unknown state "broken"`))
	add(modelCase("every state a fault", doc("allfault", variable("fan", okFailed, nil, `"fault_states": ["ok", "failed"], "table": [[0.9, 0.1]]`)), bad, "every state is a fault state"))

	// Model documents: numbers.
	add(modelCase("wrong row count", doc("rows", root("power"), variable("ups", okFailed, []string{"power"}, `"table": [[0.99, 0.01]]`)), bad, `"ups"`, "1 rows given, want 2"))
	add(modelCase("row of wrong length", doc("rowlen", variable("fan", okFailed, nil, `"table": [[0.5, 0.25, 0.25]]`)), bad, "3 values, want one per state"))
	add(modelCase("row not summing to 1", doc("sum", variable("fan", okFailed, nil, `"table": [[0.9, 0.2]]`)), bad, "sums to 1.1"))
	add(modelCase("negative probability", doc("neg", variable("fan", okFailed, nil, `"table": [[1, -0.5]]`)), bad, "row 0 value 2 = -0.5 is outside [0, 1]"))
	add(modelCase("probability above 1", doc("big", variable("fan", []string{"ok", "degraded", "failed"}, nil, `"table": [[1.25, -0.125, -0.125]]`)), bad, "1.25 is outside [0, 1]"))
	add(modelCase("NaN as a string", doc("nan", variable("fan", okFailed, nil, `"table": [["NaN", 0.5]]`)), bad, "expected float64, found JSON string"))
	add(modelCase("infinity as a huge exponent", doc("inf", variable("fan", okFailed, nil, `"table": [[1e999, 0]]`)), bad, "number 1e999"))
	add(modelCase("Infinity literal", doc("infl", variable("fan", okFailed, nil, `"table": [[Infinity, 0]]`)), bad, "invalid character 'I'", "line 1"))
	add(modelCase("noisy-OR leak above 1", doc("leak", root("power"), variable("fan", okFailed, []string{"power"}, `"noisy_or": {"leak": 1.5, "links": {"power": 0.5}}`)), bad, `"fan"`, "1.5 is outside [0, 1]"))
	add(modelCase("negative failure rate", doc("rate", variable("disk", okFailed, nil, `"failure_rate": {"lambda": -1e-4, "mission_time": 10}`)), bad, "lambda = -0.0001 must be a finite number >= 0"))
	add(modelCase("k of n beyond n", doc("kofn", root("a"), root("b"), variable("top", okFailed, []string{"a", "b"}, `"gate": {"type": "k_of_n", "k": 3}`)), bad, "k = 3"))
	add(modelCase("unknown gate type", doc("gate", root("a"), variable("top", okFailed, []string{"a"}, `"gate": {"type": "xor"}`)), bad, `unknown gate type "xor"`))
	add(modelCase("keyed row for a state the parent lacks", doc("given", root("power"), variable("fan", okFailed, []string{"power"},
		`"rows": [{"given": {"power": "ok"}, "p": [0.9, 0.1]}, {"given": {"power": "flickering"}, "p": [0.5, 0.5]}]`)), bad, `parent "power" has no state "flickering"`))

	// Model documents: size.
	many := make([]string, 10_000)
	for i := range many {
		many[i] = fmt.Sprintf("s%d", i)
	}
	row := make([]float64, len(many))
	row[0] = 1
	rowJSON, _ := json.Marshal([][]float64{row})
	add(modelCase("10,000 states", doc("wide", variable("fan", many, nil, `"table": `+string(rowJSON))), bad, "10000 states exceed the limit of 512"))
	var gate []string
	var parents []string
	for i := range 40 {
		p := fmt.Sprintf("p%d", i)
		gate = append(gate, root(p))
		parents = append(parents, p)
	}
	gate = append(gate, variable("top", okFailed, parents, `"gate": {"type": "any_of"}`))
	// 2^40 rows of 2 entries: 16 TiB of table.
	add(modelCase("gate with 40 parents", doc("gate40", gate...), bad, `"top"`, "more than the limit of 20000000 entries", "2 x 2 x 2"))
	states500 := make([]string, 500)
	for i := range states500 {
		states500[i] = fmt.Sprintf("level%d", i)
	}
	uniform := make([]float64, 500)
	for i := range uniform {
		uniform[i] = 1.0 / 500
	}
	u, _ := json.Marshal([][]float64{uniform})
	// 500^3 entries: 1 GB of table.
	add(modelCase("table of 500^3 entries", doc("cube", variable("a", states500, nil, `"table": `+string(u)), variable("b", states500, nil, `"table": `+string(u)),
		variable("c", states500, []string{"a", "b"}, `"table": `+string(u))), bad, `"c"`, "500 x 500 x 500 entries"))
	var sixtyFive []string
	var names65 []string
	for i := range 65 {
		p := fmt.Sprintf("q%d", i)
		sixtyFive = append(sixtyFive, root(p))
		names65 = append(names65, p)
	}
	sixtyFive = append(sixtyFive, variable("top", okFailed, names65, `"gate": {"type": "all_of"}`))
	add(modelCase("65 parents", doc("wide-gate", sixtyFive...), bad, "65 parents exceed the limit of 64"))
	// A name of 1 MiB quoted by 25 problems made an error of 50 MiB: an
	// error repeats at most a little of each name.
	dupStates := make([]string, 30)
	for i := range dupStates {
		dupStates[i] = "same"
	}
	longName := modelCase("a long name in every problem", doc("long", variable(strings.Repeat("n", 1<<20), dupStates, nil, `"table": [[1]]`)), bad,
		`duplicate state "same"`, "(1048576 bytes)")
	longName.maxReply = 64 << 10
	add(longName)
	big := doc("huge", variable("fan", okFailed, nil, `"description": "`+strings.Repeat("x", badMaxModelBytes)+`", "table": [[0.9, 0.1]]`))
	add(badCase{name: "model/body over the limit", method: "POST", path: "/v1/models", body: []byte(big), status: http.StatusRequestEntityTooLarge,
		want: []string{fmt.Sprintf("larger than the limit of %d bytes", badMaxModelBytes)}})
	add(badCase{name: "model/message over the limit", code: codes.ResourceExhausted, want: []string{"larger than max"},
		grpc: func(ctx context.Context, s *badStack) error {
			_, err := s.models.CreateModel(ctx, &beliefv1.CreateModelRequest{Model: &beliefv1.Model{Name: "huge", Description: strings.Repeat("x", badMaxGRPCBytes)}})
			return err
		}})

	// Model documents: JSON.
	add(modelCase("nested 100k deep", strings.Repeat("[", 100_000), bad, "exceeded max depth"))
	add(modelCase("truncated", apitest.ChestClinic[:len(apitest.ChestClinic)/2], bad, "ends early"))
	add(modelCase("empty body", "", bad, "empty document"))
	add(modelCase("array", `[]`, bad, "expected model.Document, found JSON array"))
	add(modelCase("states as a string", `{"name": "types", "variables": [{"name": "fan", "states": "ok", "table": [[1]]}]}`, bad, `"variables.states"`, "found JSON string"))
	add(modelCase("unknown field", `{"name": "typo", "variables": [{"name": "fan", "states": ["ok", "failed"], "tabel": [[0.9, 0.1]]}]}`, bad, `unknown field "tabel"`))
	add(modelCase("trailing data", doc("trail", root("fan"))+` {"name": "second"}`, bad, "unexpected data after the document"))

	// Model messages that JSON cannot hold.
	nanTable := &beliefv1.Model{Name: "nan", Variables: []*beliefv1.Variable{{Name: "fan", States: okFailed,
		Distribution: &beliefv1.Variable_Table{Table: &beliefv1.Table{Rows: []*beliefv1.Row{{P: []float64{math.NaN(), 0.5}}}}}}}}
	add(grpcModelCase("NaN in a table", nanTable, `"fan"`, "row 0 value 1 is NaN"))
	infRate := &beliefv1.Model{Name: "inf", Variables: []*beliefv1.Variable{{Name: "disk", States: okFailed,
		Distribution: &beliefv1.Variable_FailureRate{FailureRate: &beliefv1.FailureRate{Lambda: math.Inf(1), MissionTime: 10}}}}}
	add(grpcModelCase("infinite failure rate", infRate, `"disk"`, "lambda is +Inf"))
	add(badCase{name: "model/no model in the message", code: codes.InvalidArgument, want: []string{"no model given"},
		grpc: func(ctx context.Context, s *badStack) error {
			_, err := s.models.CreateModel(ctx, &beliefv1.CreateModelRequest{})
			return err
		}})

	// Queries: the model.
	add(queryCases("unknown model", `{"model": "no-such-model"}`, http.StatusNotFound, `"no-such-model"`, "not found")...)
	add(queryCases("model@999", `{"model": "chest-clinic@999"}`, http.StatusNotFound, `"chest-clinic@999"`, "not found")...)
	add(queryCases("model@0", `{"model": "chest-clinic@0"}`, bad, `version "0" is not a positive integer`)...)
	add(queryCases("model@abc", `{"model": "chest-clinic@abc"}`, bad, `version "abc" is not a positive integer`)...)
	add(queryCases("empty model name", `{"model": ""}`, bad, "no model named")...)
	add(queryCases("null body", `null`, bad, "no model named")...)

	// Queries: evidence and targets.
	cc := func(rest string) string { return `{"model": "chest-clinic", ` + rest + `}` }
	add(queryCases("unknown variable", cc(`"evidence": {"xrya": "yes"}`), bad, `unknown variable "xrya"`)...)
	add(queryCases("unknown variable in another case", cc(`"evidence": {"XRAY": "yes"}`), bad, `unknown variable "XRAY"`, `did you mean "xray"`)...)
	add(queryCases("unknown state", cc(`"evidence": {"xray": "maybe"}`), bad, `variable "xray" has no state "maybe"`, "states: no, yes")...)
	add(queryCases("soft evidence all zero", cc(`"soft_evidence": {"dysp": [0, 0]}`), bad, `soft evidence on "dysp" is zero for every state`)...)
	add(queryCases("soft evidence of wrong length", cc(`"soft_evidence": {"dysp": [0.2, 0.3, 0.5]}`), bad, `soft evidence on "dysp" has 3 likelihoods`)...)
	add(queryCases("soft evidence negative", cc(`"soft_evidence": {"dysp": [-0.5, 1]}`), bad, `"dysp"`, "-0.5 must be finite and >= 0")...)
	add(queryCases("soft evidence NaN as a string", cc(`"soft_evidence": {"dysp": ["NaN", 1]}`), bad, "soft_evidence", "string")...)
	add(queryCases("soft evidence 1e999", cc(`"soft_evidence": {"dysp": [1e999, 1]}`), bad, "number 1e999", "soft_evidence")...)
	add(grpcQueryCases("soft evidence NaN", &beliefv1.Query{Model: "chest-clinic", SoftEvidence: map[string]*beliefv1.Likelihood{"dysp": {Values: []float64{math.NaN(), 1}}}},
		`"dysp"`, "NaN must be finite")...)
	add(grpcQueryCases("soft evidence infinite", &beliefv1.Query{Model: "chest-clinic", SoftEvidence: map[string]*beliefv1.Likelihood{"dysp": {Values: []float64{1, math.Inf(1)}}}},
		`"dysp"`, "+Inf must be finite")...)
	add(queryCases("soft evidence above 1", cc(`"soft_evidence": {"dysp": [1, 5]}`), bad, `"dysp"`, "likelihood 2 = 5 is above 1")...)
	add(queryCases("soft evidence 1e308", cc(`"method": "likelihood-weighting", "soft_evidence": {"dysp": [1e308, 1e308], "xray": [1e308, 1e308]}`), bad,
		`"dysp"`, "likelihood 1 = 1e+308 is above 1")...)
	add(queryCases("hard and soft evidence on one variable", cc(`"evidence": {"xray": "yes"}, "soft_evidence": {"xray": [0.5, 0.5]}`), bad, `"xray" has both hard and soft evidence`)...)
	add(queryCases("unknown target", cc(`"targets": ["tub", "lungs"]`), bad, `unknown target variable "lungs"`)...)
	add(queryCases("forward sampling with evidence", cc(`"method": "forward", "evidence": {"xray": "yes"}`), bad, "forward sampling", "cannot condition on evidence")...)
	add(queryCases("Gibbs sampling on a deterministic gate", cc(`"method": "gibbs", "evidence": {"xray": "yes"}`), bad, "gibbs")...)

	// Evidence of probability zero: "either" is an any_of gate over tub and
	// lung (Lauritzen & Spiegelhalter 1988 define it as their logical or),
	// so tub = yes forces either = yes and P(tub = yes, either = no) = 0.
	// Exact inference says so at once; jobs are checked by
	// TestZeroProbabilityEvidence.
	add(syncCases("zero-probability evidence, exact", cc(impossible+`, "method": "exact"`), "impossible under the model")...)
	add(syncCases("zero-probability evidence, auto", cc(impossible), "impossible under the model")...)
	add(syncCases("zero-probability evidence, MPE after sampling", cc(impossible+`, "method": "likelihood-weighting", "mpe": true, "stop": {"max_samples": 1000}`),
		"impossible under the model")...)
	add(queryCases("zero-probability evidence, Gibbs", cc(impossible+`, "method": "gibbs"`), bad, "gibbs sampling may not reach every state")...)

	// Queries: stopping rules, method, priority.
	add(queryCases("negative samples", cc(`"method": "likelihood-weighting", "stop": {"max_samples": -5}`), bad, "max_samples = -5 must be positive")...)
	add(queryCases("max_samples 1e30", cc(`"stop": {"max_samples": 1e30}`), bad, "number 1e30", "max_samples")...)
	add(queryCases("max_samples 2^60", cc(`"stop": {"max_samples": 1152921504606846976}`), bad, "max_samples = 1152921504606846976 exceeds the limit")...)
	add(queryCases("confidence 1.5", cc(`"stop": {"confidence": 1.5}`), bad, "confidence = 1.5 must be in (0, 1)")...)
	add(queryCases("confidence 0.1", cc(`"stop": {"confidence": 0.1}`), bad, "confidence = 0.1 is below 0.5")...)
	add(queryCases("abs_err 2", cc(`"stop": {"abs_err": 2}`), bad, "abs_err = 2 must be in (0, 1)")...)
	add(queryCases("rel_err -1", cc(`"stop": {"rel_err": -1}`), bad, "rel_err = -1 must be a positive number")...)
	add(queryCases("timeout -1s", cc(`"stop": {"timeout": "-1s"}`), bad, `stop.timeout "-1s" must be positive`)...)
	add(queryCases("timeout soon", cc(`"stop": {"timeout": "soon"}`), bad, `stop.timeout "soon" is not a duration`)...)
	add(grpcQueryCases("abs_err NaN", &beliefv1.Query{Model: "chest-clinic", Stop: &beliefv1.StopRule{AbsErr: math.NaN()}}, "abs_err = NaN")...)
	add(grpcQueryCases("confidence infinite", &beliefv1.Query{Model: "chest-clinic", Stop: &beliefv1.StopRule{Confidence: math.Inf(-1)}}, "confidence = -Inf")...)
	add(queryCases("unknown method", cc(`"method": "magic"`), bad, `unknown method "magic"`, "exact")...)
	add(queryCases("bad priority", cc(`"priority": "urgent"`), bad, `priority "urgent"`, "low, normal or high")...)
	add(badCase{name: "query/idempotency key too long", method: "POST", path: "/v1/jobs", body: []byte(cc(`"idempotency_key": "` + strings.Repeat("k", 300) + `"`)),
		status: bad, code: codes.InvalidArgument, want: []string{"idempotency_key of 300 bytes exceeds 256"},
		grpc: func(ctx context.Context, s *badStack) error {
			_, err := s.jobs.SubmitJob(ctx, &beliefv1.SubmitJobRequest{Query: &beliefv1.Query{Model: "chest-clinic", IdempotencyKey: strings.Repeat("k", 300)}})
			return err
		}})
	add(badCase{name: "query/idempotency header differs from the body", method: "POST", path: "/v1/jobs", body: []byte(cc(`"idempotency_key": "a"`)),
		header: []string{"Idempotency-Key", "b"}, status: bad, want: []string{"differs from the Idempotency-Key header"}})

	// Queries: JSON.
	add(queryCases("nested 100k deep", strings.Repeat("[", 100_000), bad, "exceeded max depth")...)
	add(queryCases("truncated", cc(`"evidence": {"xray": "ye`)[:40], bad, "ends early")...)
	add(queryCases("empty body", "", bad, "empty")...)
	add(queryCases("unknown field", cc(`"evidance": {"xray": "yes"}`), bad, `unknown field "evidance"`)...)
	add(queryCases("evidence as a list", cc(`"evidence": ["xray"]`), bad, "evidence")...)
	add(queryCases("seed as a string", cc(`"seed": "7"`), bad, "seed")...)
	add(queryCases("trailing data", cc(`"method": "exact"`)+`{}`, bad, "unexpected data after the query document")...)
	for _, path := range []string{"/v1/jobs", "/v1/query"} {
		add(badCase{name: "query/body over the limit" + path, method: "POST", path: path, status: http.StatusRequestEntityTooLarge,
			body: []byte(cc(`"targets": ["` + strings.Repeat("x", badMaxQueryBytes) + `"]`)),
			want: []string{fmt.Sprintf("larger than the limit of %d bytes", badMaxQueryBytes)}})
	}
	add(badCase{name: "query/message over the limit", code: codes.ResourceExhausted, want: []string{"larger than max"},
		grpc: func(ctx context.Context, s *badStack) error {
			_, err := s.jobs.SubmitJob(ctx, &beliefv1.SubmitJobRequest{Query: &beliefv1.Query{Model: "chest-clinic", Targets: []string{strings.Repeat("x", badMaxGRPCBytes)}}})
			return err
		}})

	// Endpoints and parameters.
	getJob := func(id string) func(ctx context.Context, s *badStack) error {
		return func(ctx context.Context, s *badStack) error {
			_, err := s.jobs.GetJob(ctx, &beliefv1.GetJobRequest{Id: id})
			return err
		}
	}
	add(badCase{name: "job/unknown id", method: "GET", path: "/v1/jobs/jnosuchjob", status: http.StatusNotFound, code: codes.NotFound,
		want: []string{`"jnosuchjob"`, "not found"}, grpc: getJob("jnosuchjob")})
	long := strings.Repeat("j", 10_000)
	add(badCase{name: "job/id of 10,000 bytes", method: "GET", path: "/v1/jobs/" + long, status: http.StatusNotFound, code: codes.NotFound,
		want: []string{"not found"}, grpc: getJob(long)})
	add(badCase{name: "job/id with a path in it", method: "GET", path: "/v1/jobs/..%2F..%2Fetc", status: http.StatusNotFound, code: codes.NotFound,
		want: []string{`"../../etc"`, "not found"}, grpc: getJob("../../etc")})
	add(badCase{name: "job/empty id", code: codes.InvalidArgument, want: []string{"no job id given"}, grpc: getJob("")})
	add(badCase{name: "job/cancel unknown", method: "POST", path: "/v1/jobs/jnosuchjob/cancel", status: http.StatusNotFound, code: codes.NotFound,
		want: []string{`"jnosuchjob"`, "not found"}, grpc: func(ctx context.Context, s *badStack) error {
			_, err := s.jobs.CancelJob(ctx, &beliefv1.CancelJobRequest{Id: "jnosuchjob"})
			return err
		}})
	add(badCase{name: "job/events of unknown", method: "GET", path: "/v1/jobs/jnosuchjob/events", status: http.StatusNotFound, code: codes.NotFound,
		want: []string{`"jnosuchjob"`, "not found"}, grpc: func(ctx context.Context, s *badStack) error {
			st, err := s.jobs.WatchJob(ctx, &beliefv1.WatchJobRequest{Id: "jnosuchjob"})
			if err != nil {
				return err
			}
			_, err = st.Recv()
			return err
		}})
	add(badCase{name: "jobs/bad page token", method: "GET", path: "/v1/jobs?page_token=%25%25%25", status: bad, code: codes.InvalidArgument,
		want: []string{`page token "%%%"`}, grpc: func(ctx context.Context, s *badStack) error {
			_, err := s.jobs.ListJobs(ctx, &beliefv1.ListJobsRequest{PageToken: "%%%"})
			return err
		}})
	add(badCase{name: "jobs/negative page size", method: "GET", path: "/v1/jobs?page_size=-1", status: bad, code: codes.InvalidArgument,
		want: []string{"page", "-1"}, grpc: func(ctx context.Context, s *badStack) error {
			_, err := s.jobs.ListJobs(ctx, &beliefv1.ListJobsRequest{PageSize: -1})
			return err
		}})
	add(badCase{name: "models/page size not a number", method: "GET", path: "/v1/models?page_size=ten", status: bad, want: []string{`"ten" is not a page size`}})
	add(badCase{name: "models/bad page token", method: "GET", path: "/v1/models?page_token=!", status: bad, code: codes.InvalidArgument,
		want: []string{`page token "!"`}, grpc: func(ctx context.Context, s *badStack) error {
			_, err := s.models.ListModels(ctx, &beliefv1.ListModelsRequest{PageToken: "!"})
			return err
		}})
	getModel := func(name string, version int64) func(ctx context.Context, s *badStack) error {
		return func(ctx context.Context, s *badStack) error {
			_, err := s.models.GetModel(ctx, &beliefv1.GetModelRequest{Name: name, Version: version})
			return err
		}
	}
	add(badCase{name: "models/unknown", method: "GET", path: "/v1/models/no-such-model", status: http.StatusNotFound, code: codes.NotFound,
		want: []string{`"no-such-model"`, "not found"}, grpc: getModel("no-such-model", 0)})
	add(badCase{name: "models/version 999", method: "GET", path: "/v1/models/chest-clinic@999", status: http.StatusNotFound, code: codes.NotFound,
		want: []string{"chest-clinic", "999", "not found"}, grpc: getModel("chest-clinic", 999)})
	add(badCase{name: "models/version abc", method: "GET", path: "/v1/models/chest-clinic@abc", status: bad, code: codes.InvalidArgument,
		want: []string{`version "abc" is not a positive integer`}, grpc: getModel("chest-clinic@abc", 0)})
	add(badCase{name: "models/version 0", method: "GET", path: "/v1/models/chest-clinic?version=0", status: bad, want: []string{`"0" is not a version`}})
	add(badCase{name: "models/negative version", code: codes.InvalidArgument, want: []string{"version -1 is not positive"}, grpc: getModel("chest-clinic", -1)})
	add(badCase{name: "models/empty name", code: codes.InvalidArgument, want: []string{"no model name given"}, grpc: getModel("", 0)})
	add(badCase{name: "models/delete a version", method: "DELETE", path: "/v1/models/chest-clinic@1", status: bad, code: codes.InvalidArgument,
		want: []string{`"chest-clinic@1" names a version`}, grpc: func(ctx context.Context, s *badStack) error {
			_, err := s.models.DeleteModel(ctx, &beliefv1.DeleteModelRequest{Name: "chest-clinic@1"})
			return err
		}})
	add(badCase{name: "models/delete unknown", method: "DELETE", path: "/v1/models/no-such-model", status: http.StatusNotFound, code: codes.NotFound,
		want: []string{`"no-such-model"`, "not found"}, grpc: func(ctx context.Context, s *badStack) error {
			_, err := s.models.DeleteModel(ctx, &beliefv1.DeleteModelRequest{Name: "no-such-model"})
			return err
		}})
	add(badCase{name: "query/negative timeout parameter", method: "POST", path: "/v1/query?timeout=-1s", body: []byte(cc(`"method": "exact"`)), status: bad,
		want: []string{`"-1s" must be positive`}})
	add(badCase{name: "query/timeout parameter not a duration", method: "POST", path: "/v1/query?timeout=forever", body: []byte(cc(`"method": "exact"`)), status: bad,
		want: []string{`"forever" is not a duration`}})
	add(badCase{name: "query/timeout parameter over the limit", method: "POST", path: "/v1/query?timeout=1h", body: []byte(cc(`"method": "exact"`)), status: bad,
		want: []string{"1h0m0s exceeds the limit of 10m0s"}})
	add(badCase{name: "query/no query in the message", code: codes.InvalidArgument, want: []string{"no query given"},
		grpc: func(ctx context.Context, s *badStack) error {
			_, err := s.query.Query(ctx, &beliefv1.QueryRequest{})
			return err
		}})
	add(badCase{name: "endpoint/method not allowed", method: "PATCH", path: "/v1/models", status: http.StatusMethodNotAllowed, want: []string{"method PATCH is not allowed", "POST, GET, HEAD"}})
	add(badCase{name: "endpoint/unknown", method: "GET", path: "/v2/models", status: http.StatusNotFound, want: []string{"no such endpoint"}})
	return cs
}

// impossible is evidence of probability zero in the chest-clinic network
// (see the catalogue).
const impossible = `"evidence": {"tub": "yes", "either": "no"}`

// wilsonHi is the upper end of the Wilson score interval for 0 successes
// in n trials: z²/(n + z²) (Wilson 1927, JASA 22:209-212).
func wilsonHi(n int64, z float64) float64 { return z * z / (float64(n) + z*z) }

// z95 is the two-sided 95% standard normal quantile (standard normal
// tables; common practice).
const z95 = 1.959963984540054

// checkZeroResult checks a result on evidence of probability zero, as the
// JSON the API sent: P(evidence) = 0 with log10 null and an upper bound no
// higher than the score bound of 0 in n draws (every likelihood weight is
// at most 1), well-ordered marginals, and a warning that says what
// happened; no NaN anywhere.
func checkZeroResult(t *testing.T, raw []byte, method string, samples int64, warning string) {
	t.Helper()
	if !json.Valid(raw) || bytes.Contains(raw, []byte("NaN")) || bytes.Contains(raw, []byte("Inf")) {
		t.Fatalf("not finite JSON: %.500s", raw)
	}
	var r infer.Result
	if err := json.Unmarshal(raw, &r); err != nil {
		t.Fatal(err)
	}
	if r.Method != method || r.Samples != samples {
		t.Errorf("method %s, %d samples; want %s, %d", r.Method, r.Samples, method, samples)
	}
	e := r.EvidenceProbability
	if e == nil {
		t.Fatalf("no evidence_probability: %.500s", raw)
	}
	hi := wilsonHi(samples, z95)
	if e.P != 0 || e.Lo != 0 || e.Log10 != nil || !(e.Hi > 0 && e.Hi <= hi*(1+1e-9)) {
		t.Errorf("evidence_probability %+v (log10 %v), want p = lo = 0, log10 null, 0 < hi <= %.6g", *e, e.Log10, hi)
	}
	if method == infer.MethodRejection && math.Abs(e.Hi-hi) > 1e-9*hi {
		t.Errorf("rejection: P(evidence) < %.9g, want the Wilson bound %.9g", e.Hi, hi)
	}
	for v, states := range r.Marginals {
		for st, iv := range states {
			if !(0 <= iv.Lo && iv.Lo <= iv.P && iv.P <= iv.Hi && iv.Hi <= 1) {
				t.Errorf("%s=%s: %+v", v, st, iv)
			}
		}
	}
	if len(r.Warnings) != 1 || !strings.Contains(r.Warnings[0], warning) {
		t.Errorf("warnings %q, want one that says %q", r.Warnings, warning)
	}
}

// waitJob polls a job over HTTP until it ends and returns its last view.
func waitJob(t *testing.T, s *badStack, id string) []byte {
	t.Helper()
	deadline := time.Now().Add(requestTimeout)
	for {
		code, _, body, err := s.send(context.Background(), badCase{method: "GET", path: "/v1/jobs/" + id})
		if err != nil || code != http.StatusOK {
			t.Fatalf("get job %s: %d %v %.300s", id, code, err, body)
		}
		var v struct {
			State string `json:"state"`
		}
		if err := json.Unmarshal(body, &v); err != nil {
			t.Fatal(err)
		}
		if v.State != "queued" && v.State != "running" {
			return body
		}
		if time.Now().After(deadline) {
			t.Fatalf("job %s still %s after %s", id, v.State, requestTimeout)
		}
		time.Sleep(20 * time.Millisecond)
	}
}

// TestZeroProbabilityEvidence runs queries and jobs on evidence of
// probability zero. Exact inference refuses it (400, as the catalogue
// checks) and an exact job fails saying so. Sampling cannot know that a
// probability is exactly zero, only that no sample fit: a sampling query
// or job succeeds with P(evidence) = 0, its upper bound, and a plain
// warning, and a precision rule that can never be met ends at the time
// limit. No answer holds a NaN.
func TestZeroProbabilityEvidence(t *testing.T) {
	leakcheck.Check(t)
	s := newBadStack(t)
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	if _, err := s.models.CreateModel(ctx, &beliefv1.CreateModelRequest{Model: mustModelMessage(t, apitest.ChestClinic)}); err != nil {
		t.Fatal(err)
	}
	const lwWarning, rejWarning = "every sample had weight 0", "no sample matched the evidence"
	q := func(method, stop string) string {
		return `{"model": "chest-clinic", ` + impossible + `, "method": "` + method + `", "seed": 5, "stop": ` + stop + `}`
	}

	t.Run("query", func(t *testing.T) {
		for _, c := range []struct{ method, warning string }{{infer.MethodLikelihoodWeighting, lwWarning}, {infer.MethodRejection, rejWarning}} {
			code, _, body, err := s.send(ctx, badCase{method: "POST", path: "/v1/query", body: []byte(q(c.method, `{"max_samples": 10000}`))})
			if err != nil || code != http.StatusOK {
				t.Fatalf("%s: %d %v %.500s", c.method, code, err, body)
			}
			checkZeroResult(t, body, c.method, 10000, c.warning)
		}
		seed := uint64(5)
		res, err := s.query.Query(ctx, &beliefv1.QueryRequest{Query: &beliefv1.Query{Model: "chest-clinic", Evidence: map[string]string{"tub": "yes", "either": "no"},
			Method: infer.MethodLikelihoodWeighting, Seed: &seed, Stop: &beliefv1.StopRule{MaxSamples: 10000}}})
		if err != nil {
			t.Fatal(err)
		}
		raw, err := json.Marshal(convert.ResultFromProto(res))
		if err != nil {
			t.Fatal(err)
		}
		checkZeroResult(t, raw, infer.MethodLikelihoodWeighting, 10000, lwWarning)
	})

	t.Run("jobs", func(t *testing.T) {
		const samples = 2 * 8192 // two blocks
		submit := func(doc string) string {
			code, _, body, err := s.send(ctx, badCase{method: "POST", path: "/v1/jobs", body: []byte(doc)})
			if err != nil || code != http.StatusAccepted {
				t.Fatalf("submit: %d %v %.500s", code, err, body)
			}
			var v struct {
				ID string `json:"id"`
			}
			if err := json.Unmarshal(body, &v); err != nil {
				t.Fatal(err)
			}
			return v.ID
		}
		lw := submit(q(infer.MethodLikelihoodWeighting, fmt.Sprintf(`{"max_samples": %d}`, samples)))
		rej := submit(q(infer.MethodRejection, fmt.Sprintf(`{"max_samples": %d}`, samples)))
		ex := submit(q(infer.MethodExact, `{}`))
		never := submit(q(infer.MethodLikelihoodWeighting, `{"abs_err": 0.01, "timeout": "1s"}`))

		for _, c := range []struct{ id, method, warning string }{{lw, infer.MethodLikelihoodWeighting, lwWarning}, {rej, infer.MethodRejection, rejWarning}} {
			body := waitJob(t, s, c.id)
			var v struct {
				State string `json:"state"`
			}
			_ = json.Unmarshal(body, &v)
			if v.State != "succeeded" {
				t.Fatalf("%s job %s: %.500s", c.method, v.State, body)
			}
			checkZeroResult(t, body, c.method, samples, c.warning)
			j, err := s.jobs.GetJob(ctx, &beliefv1.GetJobRequest{Id: c.id})
			if err != nil {
				t.Fatal(err)
			}
			if w := j.GetResult().GetWarnings(); len(w) != 1 || !strings.Contains(w[0], c.warning) || j.GetResult().GetEvidenceProbability().Log10 != nil {
				t.Errorf("%s job over gRPC: warnings %q, evidence %v", c.method, w, j.GetResult().GetEvidenceProbability())
			}
		}

		body := waitJob(t, s, ex)
		var failed struct {
			State string `json:"state"`
			Job   struct {
				Error string `json:"error"`
			} `json:"job"`
		}
		if err := json.Unmarshal(body, &failed); err != nil {
			t.Fatal(err)
		}
		if failed.State != "failed" || !strings.Contains(failed.Job.Error, "impossible under the model") {
			t.Errorf("exact job: state %s, error %q; want failed, naming the impossible evidence", failed.State, failed.Job.Error)
		}

		body = waitJob(t, s, never)
		var r infer.Result
		if err := json.Unmarshal(body, &r); err != nil {
			t.Fatal(err)
		}
		if r.State != "succeeded" || r.StopReason != "timeout" || len(r.Warnings) != 1 || !strings.Contains(r.Warnings[0], lwWarning) {
			t.Errorf("unreachable precision: state %s, stop %s, warnings %q; want succeeded at the timeout with the warning", r.State, r.StopReason, r.Warnings)
		}
		checkZeroResult(t, body, infer.MethodLikelihoodWeighting, r.Samples, lwWarning)
	})
}

// tinyModel has a state of probability 1e-200: a valid table (the row
// sums to 1 within the tolerance), whose likelihood weights are too small
// to square in floating point.
const tinyModel = `{"name": "tiny", "variables": [
  {"name": "a", "states": ["ok", "rare"], "table": [[1, 1e-200]]},
  {"name": "b", "states": ["ok", "failed"], "parents": ["a"], "table": [[0.9, 0.1], [0.5, 0.5]]}]}`

// TestFloatingPointEdges runs sampling queries and jobs whose likelihood
// weights are about 1e-200, whose squares underflow to 0. They used to
// give NaN intervals: a 500 on POST /v1/query, and a job that could never
// be stored, which held every worker at it. Now they succeed with
// intervals [0, 1] and a warning, the evidence probability is right, and
// the workers go on to the next job.
func TestFloatingPointEdges(t *testing.T) {
	leakcheck.Check(t)
	s := newBadStack(t)
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	for _, d := range []string{apitest.ChestClinic, tinyModel} {
		if code, _, body, err := s.send(ctx, badCase{method: "POST", path: "/v1/models", body: []byte(d)}); err != nil || code != http.StatusCreated {
			t.Fatalf("create model: %d %v %.300s", code, err, body)
		}
	}
	const samples = 2 * 8192
	const warning = "too small for floating point"
	// A likelihood of 1e-200 for every state of dysp multiplies every
	// joint probability by 1e-200: P(evidence) = 1e-200 and the posterior
	// is the prior (closed form). In the tiny model P(a = rare) = 1e-200.
	queries := []struct{ name, doc string }{
		{"uniform soft evidence 1e-200", `{"model": "chest-clinic", "soft_evidence": {"dysp": [1e-200, 1e-200]}, "targets": ["tub"]`},
		{"hard evidence of probability 1e-200", `{"model": "tiny", "evidence": {"a": "rare"}, "targets": ["b"]`},
	}
	check := func(t *testing.T, raw []byte) {
		t.Helper()
		if !json.Valid(raw) || bytes.Contains(raw, []byte("NaN")) {
			t.Fatalf("not finite JSON: %.500s", raw)
		}
		var r infer.Result
		if err := json.Unmarshal(raw, &r); err != nil {
			t.Fatal(err)
		}
		if r.Samples != samples || len(r.Warnings) != 1 || !strings.Contains(r.Warnings[0], warning) {
			t.Errorf("%d samples, warnings %q; want %d and one saying %q", r.Samples, r.Warnings, samples, warning)
		}
		if e := r.EvidenceProbability; e == nil || e.Log10 == nil || math.Abs(*e.Log10+200) > 1e-9 || e.Lo != 0 || e.Hi < e.P {
			t.Errorf("evidence_probability %+v, want log10 -200 (closed form) within [0, hi]", e)
		}
		for v, states := range r.Marginals {
			for st, iv := range states {
				if iv.Lo != 0 || iv.Hi != 1 || iv.P < 0 || iv.P > 1 {
					t.Errorf("%s=%s: %+v, want a point estimate in [0, 1] and the interval [0, 1]", v, st, iv)
				}
			}
		}
		// The point estimate is still the sample frequency: P(tub = yes) =
		// 0.0104 (Lauritzen & Spiegelhalter 1988) within 5 binomial standard
		// errors (a false failure about once in 1.7 million seeds).
		if iv, ok := r.Marginals["tub"]["yes"]; ok {
			se := math.Sqrt(0.0104 * (1 - 0.0104) / samples)
			if math.Abs(iv.P-0.0104) > 5*se {
				t.Errorf("P(tub = yes) = %v, want 0.0104 within %.2g", iv.P, 5*se)
			}
		}
	}
	for _, q := range queries {
		t.Run(q.name, func(t *testing.T) {
			doc := q.doc + fmt.Sprintf(`, "method": "likelihood-weighting", "seed": 11, "stop": {"max_samples": %d}}`, samples)
			code, _, body, err := s.send(ctx, badCase{method: "POST", path: "/v1/query", body: []byte(doc)})
			if err != nil || code != http.StatusOK {
				t.Fatalf("query: %d %v %.500s", code, err, body)
			}
			check(t, body)
			code, _, body, err = s.send(ctx, badCase{method: "POST", path: "/v1/jobs", body: []byte(doc)})
			if err != nil || code != http.StatusAccepted {
				t.Fatalf("submit: %d %v %.500s", code, err, body)
			}
			var v struct {
				ID string `json:"id"`
			}
			if err := json.Unmarshal(body, &v); err != nil {
				t.Fatal(err)
			}
			body = waitJob(t, s, v.ID)
			if !bytes.Contains(body, []byte(`"state":"succeeded"`)) {
				t.Fatalf("job: %.500s", body)
			}
			check(t, body)
		})
	}
	// The workers were not held: an ordinary job after them finishes.
	seed := uint64(3)
	j, err := s.jobs.SubmitJob(ctx, &beliefv1.SubmitJobRequest{Query: &beliefv1.Query{Model: "chest-clinic", Method: infer.MethodLikelihoodWeighting,
		Seed: &seed, Stop: &beliefv1.StopRule{MaxSamples: 8192}}})
	if err != nil {
		t.Fatal(err)
	}
	if body := waitJob(t, s, j.GetJob().GetId()); !bytes.Contains(body, []byte(`"state":"succeeded"`)) {
		t.Errorf("ordinary job after them: %.500s", body)
	}
}

// errorShape is the one error body of the HTTP API (api/doc.go).
type errorShape struct {
	Error struct {
		Status          int    `json:"status"`
		Code            string `json:"code"`
		Reason          string `json:"reason"`
		Message         string `json:"message"`
		FieldViolations []struct {
			Field       string `json:"field"`
			Description string `json:"description"`
		} `json:"field_violations"`
	} `json:"error"`
}

func (s *badStack) send(ctx context.Context, c badCase) (int, http.Header, []byte, error) {
	req, err := http.NewRequestWithContext(ctx, c.method, s.base+c.path, bytes.NewReader(c.body))
	if err != nil {
		return 0, nil, nil, err
	}
	for i := 0; i+1 < len(c.header); i += 2 {
		req.Header.Set(c.header[i], c.header[i+1])
	}
	resp, err := s.client.Do(req)
	if err != nil {
		return 0, nil, nil, err
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	return resp.StatusCode, resp.Header, b, err
}

func checkHTTP(t *testing.T, s *badStack, c badCase) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), requestTimeout)
	defer cancel()
	code, hdr, body, err := s.send(ctx, c)
	if err != nil {
		t.Fatalf("HTTP %s %s: %v", c.method, c.path, err)
	}
	if code != c.status {
		t.Fatalf("HTTP %s %s: status %d, want %d: %.500s", c.method, c.path, code, c.status, body)
	}
	if c.maxReply > 0 && len(body) > c.maxReply {
		t.Errorf("HTTP: a reply of %d bytes, bound %d", len(body), c.maxReply)
	}
	if ct := hdr.Get("Content-Type"); ct != "application/json" {
		t.Errorf("HTTP: Content-Type %q", ct)
	}
	var e errorShape
	dec := json.NewDecoder(bytes.NewReader(body))
	dec.DisallowUnknownFields()
	if err := dec.Decode(&e); err != nil {
		t.Fatalf("HTTP: body is not the error shape (%v): %.500s", err, body)
	}
	wantCode := errmap.CodeName(codeOf(c.status))
	if c.status == http.StatusRequestEntityTooLarge {
		wantCode = "INVALID_ARGUMENT"
	}
	if e.Error.Status != code || e.Error.Code != wantCode || e.Error.Reason == "" || e.Error.FieldViolations == nil {
		t.Errorf("HTTP: error %+v, want status %d, code %s, a reason and a field_violations list", e.Error, code, wantCode)
	}
	for _, w := range c.want {
		if !strings.Contains(e.Error.Message, w) {
			t.Errorf("HTTP: message %.300q does not mention %q", e.Error.Message, w)
		}
	}
}

func checkGRPC(t *testing.T, s *badStack, c badCase) {
	t.Helper()
	ctx, cancel := context.WithTimeout(context.Background(), requestTimeout)
	defer cancel()
	err := c.grpc(ctx, s)
	st, ok := status.FromError(err)
	if err == nil || !ok {
		t.Fatalf("gRPC: %v, want a status error with code %s", err, c.code)
	}
	if st.Code() != c.code {
		t.Fatalf("gRPC: code %s, want %s: %.300s", st.Code(), c.code, st.Message())
	}
	if n := proto.Size(st.Proto()); c.maxReply > 0 && n > c.maxReply {
		t.Errorf("gRPC: a status of %d bytes, bound %d", n, c.maxReply)
	}
	for _, w := range c.want {
		if !strings.Contains(st.Message(), w) {
			t.Errorf("gRPC: message %.300q does not mention %q", st.Message(), w)
		}
	}
	if c.code == codes.ResourceExhausted {
		return // the transport's own limit: no beliefd details
	}
	reason := ""
	for _, d := range st.Details() {
		if info, ok := d.(*errdetails.ErrorInfo); ok && info.GetDomain() == errmap.Domain {
			reason = info.GetReason()
		}
	}
	if reason == "" {
		t.Errorf("gRPC: no ErrorInfo of domain %q in %v", errmap.Domain, st.Details())
	}
}

// memNow returns the live heap and the memory obtained from the OS after a
// full collection.
func memNow() (alloc, sys uint64) {
	runtime.GC()
	runtime.GC()
	var ms runtime.MemStats
	runtime.ReadMemStats(&ms)
	return ms.HeapAlloc, ms.Sys
}

// TestBadInputCatalogue sends every malformed model and query of the
// catalogue to a real server over loopback HTTP and gRPC: each gets a
// client error (4xx, INVALID_ARGUMENT, NOT_FOUND, ...) whose message says
// what is wrong, none a server error, a panic or a hang, and the process's
// memory stays bounded.
func TestBadInputCatalogue(t *testing.T) {
	leakcheck.Check(t)
	s := newBadStack(t)
	ctx, cancel := context.WithTimeout(context.Background(), time.Minute)
	defer cancel()
	if _, err := s.models.CreateModel(ctx, &beliefv1.CreateModelRequest{Model: mustModelMessage(t, apitest.ChestClinic)}); err != nil {
		t.Fatal(err)
	}
	cases := catalogue()
	allocBefore, sysBefore := memNow()
	transports := 0
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			if c.method != "" {
				checkHTTP(t, s, c)
				transports++
			}
			if c.grpc != nil {
				checkGRPC(t, s, c)
				transports++
			}
		})
	}
	allocAfter, sysAfter := memNow()
	runtime.KeepAlive(cases)
	if len(cases) < 40 {
		t.Errorf("the catalogue has %d cases, want at least 40", len(cases))
	}
	t.Logf("%d cases, %d requests; heap %d -> %d KiB, from the OS %d -> %d KiB",
		len(cases), transports, allocBefore>>10, allocAfter>>10, sysBefore>>10, sysAfter>>10)
	// Bounds. The largest request is a model body of badMaxModelBytes
	// (2 MiB). Handling it holds a few copies at once (the request buffer,
	// the decoded document, the gRPC message and its re-encoding, the
	// error): well under 32 MiB, twice that with the collector's headroom
	// (GOGC=100), so memory from the OS may grow by 64 MiB; 200 MiB leaves
	// room for the runtime's own caches. A case that built a table it
	// should have refused (the 40-parent gate: 16 TiB; the 500^3 table:
	// 1 GB) or answered with an error that repeats its input many times
	// (the 1 MiB name in 25 problems: 50 MiB) exceeds that by far.
	// Nothing of a refused request is kept, so the live heap stays where it
	// was, give or take the server's caches (a few KiB): 32 MiB is slack.
	const sysBound, heapBound = 200 << 20, 32 << 20
	if sysAfter > sysBefore && sysAfter-sysBefore > sysBound {
		t.Errorf("memory from the OS grew by %d MiB over the catalogue, bound %d MiB", (sysAfter-sysBefore)>>20, sysBound>>20)
	}
	if allocAfter > allocBefore && allocAfter-allocBefore > heapBound {
		t.Errorf("live heap grew by %d MiB over the catalogue, bound %d MiB", (allocAfter-allocBefore)>>20, heapBound>>20)
	}
}

func mustModelMessage(t *testing.T, doc string) *beliefv1.Model {
	t.Helper()
	d, err := model.DecodeBytes([]byte(doc))
	if err != nil {
		t.Fatal(err)
	}
	m, err := convert.ModelToProto(d)
	if err != nil {
		t.Fatal(err)
	}
	return m
}
