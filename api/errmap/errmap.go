// Package errmap maps the errors of beliefd's service layer to gRPC codes
// and HTTP statuses, once, for both transports. It branches on sentinel
// errors with errors.Is and reads typed errors with errors.As, so wrapped
// errors map the same; it never looks at message text.
//
//	model.ErrMalformed, model.ErrInvalid, model.ErrBadEvidence,
//	infer.ErrBadQuery, exact.ErrZeroEvidence, gibbs.ErrReducible,
//	gibbs.ErrImpossibleEvidence, sampling.ErrBadStop,
//	model.ErrTooLarge, exact.ErrTooCostly, *FieldError    400 INVALID_ARGUMENT
//	*http.MaxBytesError (a request body over the limit)   413 INVALID_ARGUMENT
//	ErrUnauthenticated (no or unknown bearer token)       401 UNAUTHENTICATED
//	jobs.ErrForbidden (the caller's role does not allow)  403 PERMISSION_DENIED
//	jobs.ErrNotFound                                      404 NOT_FOUND
//	standing.ErrExists                                    409 ALREADY_EXISTS
//	standing.ErrRevisionMismatch                          409 ABORTED
//	standing.ErrLimit                                     429 RESOURCE_EXHAUSTED
//	jobs.ErrConflict                                      409 ABORTED
//	jobs.ErrQueueFull                                     429 RESOURCE_EXHAUSTED
//	jobs.ErrQuotaExceeded                                 429 RESOURCE_EXHAUSTED
//	jobs.ErrUnavailable                                   503 UNAVAILABLE
//	context.DeadlineExceeded                              504 DEADLINE_EXCEEDED
//	context.Canceled                                      499 CANCELLED
//	anything else                                         500 INTERNAL
//
// Client errors (4xx) carry the error's own message, which names what is
// wrong; server errors carry a short fixed text, so internal details do not
// leak. A *model.ValidationError becomes one field violation per problem,
// with fields such as "variables[fan].table".
package errmap

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"net/http"

	"github.com/beliefd/beliefd/service/exact"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
	"github.com/beliefd/beliefd/service/sampling/gibbs"
	"github.com/beliefd/beliefd/service/standing"
	"google.golang.org/genproto/googleapis/rpc/errdetails"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/status"
	"google.golang.org/protobuf/protoadapt"
)

// Domain is the ErrorInfo domain of beliefd's gRPC errors.
const Domain = "beliefd"

// StatusClientClosedRequest is the HTTP status for a request whose client
// went away (common practice: nginx's 499).
const StatusClientClosedRequest = 499

// ErrInvalidArgument is wrapped by *FieldError.
var ErrInvalidArgument = errors.New("invalid argument")

// ErrUnauthenticated: the request carries no credentials, or credentials
// the server does not know. Transports answer 401 / UNAUTHENTICATED.
var ErrUnauthenticated = errors.New("unauthenticated")

// FieldError is a transport-level problem with one request field, such as
// a page size out of range. It wraps ErrInvalidArgument.
type FieldError struct {
	Field   string
	Message string
}

func (e *FieldError) Error() string { return e.Field + ": " + e.Message }

// Unwrap lets errors.Is find ErrInvalidArgument.
func (e *FieldError) Unwrap() error { return ErrInvalidArgument }

// Invalid returns a *FieldError for field with a formatted message.
func Invalid(field, format string, args ...any) error {
	return &FieldError{Field: field, Message: fmt.Sprintf(format, args...)}
}

// FieldViolation names a request field at fault and what is wrong with it.
type FieldViolation struct {
	Field       string `json:"field"`
	Description string `json:"description"`
}

// Error is an error as the transports report it.
type Error struct {
	// HTTPStatus is the HTTP status code.
	HTTPStatus int
	// Code is the gRPC code; Code.String() is the "code" of the HTTP error body.
	Code codes.Code
	// Reason is a stable UPPER_SNAKE_CASE reason callers may branch on.
	Reason string
	// Message is safe to show to the caller.
	Message string
	// Violations are the fields at fault, when known.
	Violations []FieldViolation
	// Server reports a server-side failure (5xx) whose cause deserves a log line.
	Server bool
}

type rule struct {
	is     error
	status int
	code   codes.Code
	reason string
	// fixed replaces the error's message (server errors and context ends).
	fixed string
	// field, when set, names the request field at fault.
	field string
}

// rules are tried in order: more specific sentinels first, since some
// errors wrap several (ErrTooLarge comes with ErrInvalid, sampler errors
// about a query come wrapped in ErrBadQuery).
var rules = []rule{
	{is: model.ErrTooLarge, status: http.StatusBadRequest, code: codes.InvalidArgument, reason: "MODEL_TOO_LARGE"},
	{is: model.ErrMalformed, status: http.StatusBadRequest, code: codes.InvalidArgument, reason: "MALFORMED_MODEL"},
	{is: model.ErrInvalid, status: http.StatusBadRequest, code: codes.InvalidArgument, reason: "INVALID_MODEL"},
	{is: exact.ErrTooCostly, status: http.StatusBadRequest, code: codes.InvalidArgument, reason: "EXACT_TOO_COSTLY", field: "method"},
	{is: exact.ErrZeroEvidence, status: http.StatusBadRequest, code: codes.InvalidArgument, reason: "ZERO_PROBABILITY_EVIDENCE", field: "evidence"},
	{is: gibbs.ErrImpossibleEvidence, status: http.StatusBadRequest, code: codes.InvalidArgument, reason: "ZERO_PROBABILITY_EVIDENCE", field: "evidence"},
	{is: gibbs.ErrReducible, status: http.StatusBadRequest, code: codes.InvalidArgument, reason: "GIBBS_REDUCIBLE", field: "method"},
	{is: sampling.ErrBadStop, status: http.StatusBadRequest, code: codes.InvalidArgument, reason: "BAD_STOP_RULE", field: "stop"},
	{is: model.ErrBadEvidence, status: http.StatusBadRequest, code: codes.InvalidArgument, reason: "BAD_EVIDENCE"},
	{is: infer.ErrBadQuery, status: http.StatusBadRequest, code: codes.InvalidArgument, reason: "BAD_QUERY"},
	{is: ErrInvalidArgument, status: http.StatusBadRequest, code: codes.InvalidArgument, reason: "INVALID_ARGUMENT"},
	{is: ErrUnauthenticated, status: http.StatusUnauthorized, code: codes.Unauthenticated, reason: "UNAUTHENTICATED"},
	{is: jobs.ErrForbidden, status: http.StatusForbidden, code: codes.PermissionDenied, reason: "PERMISSION_DENIED"},
	{is: jobs.ErrNotFound, status: http.StatusNotFound, code: codes.NotFound, reason: "NOT_FOUND"},
	{is: standing.ErrExists, status: http.StatusConflict, code: codes.AlreadyExists, reason: "ALREADY_EXISTS", field: "id"},
	{is: standing.ErrRevisionMismatch, status: http.StatusConflict, code: codes.Aborted, reason: "REVISION_MISMATCH", field: "expect_revision"},
	{is: standing.ErrLimit, status: http.StatusTooManyRequests, code: codes.ResourceExhausted, reason: "STANDING_QUERY_LIMIT"},
	{is: jobs.ErrConflict, status: http.StatusConflict, code: codes.Aborted, reason: "CONFLICT",
		fixed: "a concurrent update won; try again"},
	{is: jobs.ErrQueueFull, status: http.StatusTooManyRequests, code: codes.ResourceExhausted, reason: "QUEUE_FULL"},
	{is: jobs.ErrQuotaExceeded, status: http.StatusTooManyRequests, code: codes.ResourceExhausted, reason: "QUOTA_EXCEEDED"},
	{is: jobs.ErrUnavailable, status: http.StatusServiceUnavailable, code: codes.Unavailable, reason: "UNAVAILABLE",
		fixed: "the job store is unavailable; try again later"},
	{is: context.DeadlineExceeded, status: http.StatusGatewayTimeout, code: codes.DeadlineExceeded, reason: "DEADLINE_EXCEEDED",
		fixed: "the deadline passed before the request finished"},
	{is: context.Canceled, status: StatusClientClosedRequest, code: codes.Canceled, reason: "CANCELLED",
		fixed: "the request was cancelled"},
}

// Map maps err (not nil) to its transport form.
func Map(err error) Error {
	var mbe *http.MaxBytesError
	if errors.As(err, &mbe) {
		return Error{HTTPStatus: http.StatusRequestEntityTooLarge, Code: codes.InvalidArgument, Reason: "BODY_TOO_LARGE",
			Message: fmt.Sprintf("request body larger than the limit of %d bytes", mbe.Limit)}
	}
	for _, r := range rules {
		if !errors.Is(err, r.is) {
			continue
		}
		e := Error{HTTPStatus: r.status, Code: r.code, Reason: r.reason, Message: err.Error(), Server: r.status >= 500}
		if r.fixed != "" {
			e.Message = r.fixed
		}
		e.Violations = violations(err, r.field)
		return e
	}
	return Error{HTTPStatus: http.StatusInternalServerError, Code: codes.Internal, Reason: "INTERNAL",
		Message: "internal error", Server: true}
}

// violations lists the fields at fault: every problem of a validation
// error, the field of a *FieldError, or the field a sentinel implies.
func violations(err error, field string) []FieldViolation {
	var ve *model.ValidationError
	if errors.As(err, &ve) {
		out := make([]FieldViolation, 0, len(ve.Problems))
		for _, p := range ve.Problems {
			out = append(out, FieldViolation{Field: problemField(p), Description: p.Message})
		}
		return out
	}
	var fe *FieldError
	if errors.As(err, &fe) {
		return []FieldViolation{{Field: fe.Field, Description: fe.Message}}
	}
	if field != "" {
		return []FieldViolation{{Field: field, Description: err.Error()}}
	}
	return nil
}

func problemField(p model.Problem) string {
	switch {
	case p.Variable != "" && p.Field != "":
		return "variables[" + p.Variable + "]." + p.Field
	case p.Variable != "":
		return "variables[" + p.Variable + "]"
	case p.Field != "":
		return p.Field
	}
	return "model"
}

// httpBody is the one error shape of the HTTP API.
type httpBody struct {
	Error httpDetail `json:"error"`
}

type httpDetail struct {
	Status          int              `json:"status"`
	Code            string           `json:"code"`
	Reason          string           `json:"reason"`
	Message         string           `json:"message"`
	FieldViolations []FieldViolation `json:"field_violations"`
}

// WriteHTTP writes e as the HTTP API's error body with its status, for
// handlers outside package httpapi (which writes the same shape).
func (e Error) WriteHTTP(w http.ResponseWriter) {
	v := e.Violations
	if v == nil {
		v = []FieldViolation{}
	}
	body, err := json.Marshal(httpBody{Error: httpDetail{Status: e.HTTPStatus, Code: CodeName(e.Code), Reason: e.Reason, Message: e.Message, FieldViolations: v}})
	if err != nil {
		// Only invalid UTF-8 could fail here, and json.Marshal replaces it.
		body = []byte(`{"error":{"status":500,"code":"INTERNAL","reason":"INTERNAL","message":"internal error","field_violations":[]}}`)
	}
	w.Header().Set("Content-Type", "application/json")
	w.Header().Set("X-Content-Type-Options", "nosniff")
	w.WriteHeader(e.HTTPStatus)
	_, _ = w.Write(append(body, '\n'))
}

// GRPC returns the gRPC status error for err, with an ErrorInfo detail and
// a BadRequest detail when fields are at fault. fieldPrefix is put before
// every field name, so fields are paths in the request message (for
// example "model." for the model of a CreateModelRequest). nil maps to nil.
func GRPC(err error, fieldPrefix string) error {
	if err == nil {
		return nil
	}
	if _, ok := status.FromError(err); ok {
		return err // already a status from a lower gRPC layer
	}
	return Map(err).Status(fieldPrefix).Err()
}

// Status builds the gRPC status of e.
func (e Error) Status(fieldPrefix string) *status.Status {
	st := status.New(e.Code, e.Message)
	details := []protoadapt.MessageV1{&errdetails.ErrorInfo{Reason: e.Reason, Domain: Domain}}
	if len(e.Violations) > 0 {
		br := &errdetails.BadRequest{}
		for _, v := range e.Violations {
			br.FieldViolations = append(br.FieldViolations, &errdetails.BadRequest_FieldViolation{Field: fieldPrefix + v.Field, Description: v.Description})
		}
		details = append(details, br)
	}
	withDetails, err := st.WithDetails(details...)
	if err != nil {
		return st
	}
	return withDetails
}

// codeNames are the canonical names of the gRPC codes (as in
// google/rpc/code.proto), used as "code" in HTTP error bodies.
var codeNames = map[codes.Code]string{
	codes.OK: "OK", codes.Canceled: "CANCELLED", codes.Unknown: "UNKNOWN", codes.InvalidArgument: "INVALID_ARGUMENT",
	codes.DeadlineExceeded: "DEADLINE_EXCEEDED", codes.NotFound: "NOT_FOUND", codes.AlreadyExists: "ALREADY_EXISTS",
	codes.PermissionDenied: "PERMISSION_DENIED", codes.ResourceExhausted: "RESOURCE_EXHAUSTED",
	codes.FailedPrecondition: "FAILED_PRECONDITION", codes.Aborted: "ABORTED", codes.OutOfRange: "OUT_OF_RANGE",
	codes.Unimplemented: "UNIMPLEMENTED", codes.Internal: "INTERNAL", codes.Unavailable: "UNAVAILABLE",
	codes.DataLoss: "DATA_LOSS", codes.Unauthenticated: "UNAUTHENTICATED",
}

// CodeName is the canonical name of a gRPC code, such as "INVALID_ARGUMENT".
func CodeName(c codes.Code) string {
	if n, ok := codeNames[c]; ok {
		return n
	}
	return "UNKNOWN"
}
