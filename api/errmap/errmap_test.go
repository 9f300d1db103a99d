package errmap

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"

	"github.com/beliefd/beliefd/service/exact"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
	"github.com/beliefd/beliefd/service/sampling/gibbs"
	"google.golang.org/genproto/googleapis/rpc/errdetails"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
)

// realErrors produces errors the way the service layer does, from real
// inputs, wrapped once more as a caller would.
func validationError(t *testing.T) error {
	t.Helper()
	doc, err := model.DecodeBytes([]byte(`{"name": "m", "variables": [
		{"name": "a", "states": ["x", "y"], "table": [[0.5, 0.6]]},
		{"name": "b", "states": ["x", "y"], "parents": ["a"], "table": [[0.5, 0.5]]}]}`))
	if err != nil {
		t.Fatal(err)
	}
	_, err = model.Compile(doc, model.Limits{})
	if err == nil {
		t.Fatal("invalid model compiled")
	}
	return fmt.Errorf("put model: %w", err)
}

func tooLargeError(t *testing.T) error {
	t.Helper()
	doc, err := model.DecodeBytes([]byte(`{"name": "m", "variables": [{"name": "a", "states": ["x", "y", "z"], "table": [[0.2, 0.3, 0.5]]}]}`))
	if err != nil {
		t.Fatal(err)
	}
	_, err = model.Compile(doc, model.Limits{MaxStates: 2})
	if !errors.Is(err, model.ErrTooLarge) {
		t.Fatalf("compile with MaxStates 2: %v, want ErrTooLarge", err)
	}
	return err
}

func maxBytesError(t *testing.T) error {
	t.Helper()
	r := http.MaxBytesReader(httptest.NewRecorder(), io.NopCloser(strings.NewReader("0123456789")), 4)
	_, err := io.ReadAll(r)
	if err == nil {
		t.Fatal("MaxBytesReader read past its limit")
	}
	return fmt.Errorf("read model: %w", err)
}

func TestMap(t *testing.T) {
	_, stopErr := infer.StopRule{AbsErr: 2}.Sampling()
	_, malformed := model.DecodeBytes([]byte(`{"name": 3}`))
	cases := []struct {
		name   string
		err    error
		status int
		code   codes.Code
		reason string
		fields string
		// fixed: the message is a fixed text rather than the error's own.
		fixed bool
	}{
		{"validation", validationError(t), 400, codes.InvalidArgument, "INVALID_MODEL", "variables[a].table variables[b].table", false},
		{"too large", tooLargeError(t), 400, codes.InvalidArgument, "MODEL_TOO_LARGE", "variables[a].states", false},
		{"malformed", fmt.Errorf("put model: %w", malformed), 400, codes.InvalidArgument, "MALFORMED_MODEL", "", false},
		{"bad evidence", fmt.Errorf("submit: %w: unknown variable", model.ErrBadEvidence), 400, codes.InvalidArgument, "BAD_EVIDENCE", "", false},
		{"bad stop", fmt.Errorf("submit: %w", stopErr), 400, codes.InvalidArgument, "BAD_STOP_RULE", "stop", false},
		{"bad query", fmt.Errorf("submit: %w: unknown method", infer.ErrBadQuery), 400, codes.InvalidArgument, "BAD_QUERY", "", false},
		{"zero evidence wrapped as bad query", fmt.Errorf("%w: %w", infer.ErrBadQuery, exact.ErrZeroEvidence), 400, codes.InvalidArgument, "ZERO_PROBABILITY_EVIDENCE", "evidence", false},
		{"too costly", fmt.Errorf("query: %w", &exact.TooCostlyError{Limit: 10}), 400, codes.InvalidArgument, "EXACT_TOO_COSTLY", "method", false},
		{"reducible", fmt.Errorf("submit: %w", gibbs.ErrReducible), 400, codes.InvalidArgument, "GIBBS_REDUCIBLE", "method", false},
		{"field", Invalid("page_size", "negative"), 400, codes.InvalidArgument, "INVALID_ARGUMENT", "page_size", false},
		{"body too large", maxBytesError(t), 413, codes.InvalidArgument, "BODY_TOO_LARGE", "", true},
		{"not found", fmt.Errorf("get job %q: %w", "j", jobs.ErrNotFound), 404, codes.NotFound, "NOT_FOUND", "", false},
		{"conflict", fmt.Errorf("update: %w", jobs.ErrConflict), 409, codes.Aborted, "CONFLICT", "", true},
		{"queue full", fmt.Errorf("submit: %w", jobs.ErrQueueFull), 429, codes.ResourceExhausted, "QUEUE_FULL", "", false},
		{"quota", fmt.Errorf("submit: %w: max_samples_per_job of tenant %q is 1000", jobs.ErrQuotaExceeded, "t"), 429, codes.ResourceExhausted, "QUOTA_EXCEEDED", "", false},
		{"unauthenticated", fmt.Errorf("%w: no bearer token", ErrUnauthenticated), 401, codes.Unauthenticated, "UNAUTHENTICATED", "", false},
		{"forbidden", fmt.Errorf("tenant usage: %w: the admin role is needed", jobs.ErrForbidden), 403, codes.PermissionDenied, "PERMISSION_DENIED", "", false},
		{"unavailable", fmt.Errorf("redis 10.0.0.7:6379: %w", jobs.ErrUnavailable), 503, codes.Unavailable, "UNAVAILABLE", "", true},
		{"deadline", fmt.Errorf("query: %w", context.DeadlineExceeded), 504, codes.DeadlineExceeded, "DEADLINE_EXCEEDED", "", true},
		{"cancelled", fmt.Errorf("query: %w", context.Canceled), 499, codes.Canceled, "CANCELLED", "", true},
		{"internal", fmt.Errorf("merge: %w", sampling.ErrStatsMismatch), 500, codes.Internal, "INTERNAL", "", true},
		{"lease lost is internal", fmt.Errorf("commit: %w", jobs.ErrLeaseLost), 500, codes.Internal, "INTERNAL", "", true},
	}
	for _, tc := range cases {
		t.Run(tc.name, func(t *testing.T) {
			e := Map(tc.err)
			if e.HTTPStatus != tc.status || e.Code != tc.code || e.Reason != tc.reason {
				t.Errorf("Map = %d %v %s, want %d %v %s", e.HTTPStatus, e.Code, e.Reason, tc.status, tc.code, tc.reason)
			}
			var fs []string
			for _, v := range e.Violations {
				fs = append(fs, v.Field)
				if v.Description == "" {
					t.Errorf("violation on %s has no description", v.Field)
				}
			}
			if got := strings.Join(fs, " "); got != tc.fields {
				t.Errorf("violations on %q, want %q", got, tc.fields)
			}
			if tc.fixed == strings.Contains(e.Message, tc.err.Error()) {
				t.Errorf("message %q: want the error's own text %v", e.Message, !tc.fixed)
			}
			if e.Server != (tc.status >= 500) {
				t.Errorf("Server = %v for status %d", e.Server, tc.status)
			}
		})
	}
}

func TestGRPCStatus(t *testing.T) {
	err := GRPC(validationError(t), "model.")
	st, ok := status.FromError(err)
	if !ok || st.Code() != codes.InvalidArgument {
		t.Fatalf("GRPC = %v", err)
	}
	var info *errdetails.ErrorInfo
	var br *errdetails.BadRequest
	for _, d := range st.Details() {
		switch d := d.(type) {
		case *errdetails.ErrorInfo:
			info = d
		case *errdetails.BadRequest:
			br = d
		}
	}
	if info.GetReason() != "INVALID_MODEL" || info.GetDomain() != Domain {
		t.Errorf("ErrorInfo %v", info)
	}
	if len(br.GetFieldViolations()) != 2 || br.GetFieldViolations()[0].GetField() != "model.variables[a].table" ||
		!strings.Contains(br.GetFieldViolations()[1].GetDescription(), "1 rows given, want 2") {
		t.Errorf("BadRequest %v", br)
	}
	// A status from a lower layer passes through; nil stays nil.
	inner := status.Error(codes.PermissionDenied, "no")
	if got := GRPC(fmt.Errorf("call: %w", inner), ""); status.Code(got) != codes.PermissionDenied {
		t.Errorf("wrapped status became %v", got)
	}
	if GRPC(nil, "") != nil {
		t.Error("GRPC(nil) != nil")
	}
}

func TestCodeName(t *testing.T) {
	// Names as in google/rpc/code.proto (common practice).
	for c, want := range map[codes.Code]string{codes.InvalidArgument: "INVALID_ARGUMENT", codes.Canceled: "CANCELLED",
		codes.ResourceExhausted: "RESOURCE_EXHAUSTED", codes.Code(99): "UNKNOWN"} {
		if got := CodeName(c); got != want {
			t.Errorf("CodeName(%v) = %s, want %s", c, got, want)
		}
	}
}

func TestWriteHTTP(t *testing.T) {
	rec := httptest.NewRecorder()
	Map(fmt.Errorf("%w: no bearer token", ErrUnauthenticated)).WriteHTTP(rec)
	want := `{"error":{"status":401,"code":"UNAUTHENTICATED","reason":"UNAUTHENTICATED","message":"unauthenticated: no bearer token","field_violations":[]}}` + "\n"
	if rec.Code != 401 || rec.Body.String() != want || rec.Header().Get("Content-Type") != "application/json" {
		t.Errorf("WriteHTTP: %d %s %q, want 401 application/json %q", rec.Code, rec.Header().Get("Content-Type"), rec.Body.String(), want)
	}
}
