package standing

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"maps"
	"slices"
	"time"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
)

// Sentinel errors. Not-found errors wrap jobs.ErrNotFound, so transports
// map them as they map a missing job.
var (
	// ErrExists: the tenant already has a standing query with this ID.
	ErrExists = errors.New("standing query already exists")
	// ErrLimit: as many standing queries are registered as allowed.
	ErrLimit = errors.New("standing query limit reached")
	// ErrRevisionMismatch: an update named the revision it expected and the
	// evidence is at another one.
	ErrRevisionMismatch = errors.New("evidence revision mismatch")
	// ErrConflict is returned by Store.SetEvidence when the record is not
	// at the expected revision; the Service retries or reports
	// ErrRevisionMismatch.
	ErrConflict = errors.New("evidence changed concurrently")
)

// Status values of a View.
const (
	// StatusPending: no recompute has finished yet.
	StatusPending = "pending"
	// StatusCurrent: the result answers the current evidence revision.
	StatusCurrent = "current"
	// StatusUpdating: the result answers an older revision; a recompute is due.
	StatusUpdating = "updating"
	// StatusFailed: the recompute of the current revision failed (Error says why).
	StatusFailed = "failed"
)

// Key identifies a standing query: its tenant and its ID.
type Key struct {
	Tenant string
	ID     string
}

func (k Key) String() string {
	if k.Tenant == "" {
		return k.ID
	}
	return k.Tenant + "/" + k.ID
}

// Spec registers a standing query (the body of a create request).
type Spec struct {
	// ID names the standing query within its tenant: 1 to 64 letters,
	// digits, '.', '_' and '-', starting with a letter or digit. Empty:
	// the service picks one.
	ID string `json:"id,omitempty"`
	// Model is "NAME" (each recompute uses the latest version) or
	// "NAME@VERSION".
	Model string `json:"model"`
	// Targets are the variables whose posteriors are kept and exported.
	Targets []string `json:"targets"`
	// Evidence is the initial hard evidence: variable -> state.
	Evidence map[string]string `json:"evidence,omitempty"`
	// Method and Stop are those of a query document.
	Method string         `json:"method,omitempty"`
	Stop   infer.StopRule `json:"stop,omitzero"`
	// Seed, when set, seeds every recompute; otherwise each evidence
	// revision gets a seed derived from the key and the revision, so the
	// same revision gives the same numbers whoever computes it.
	Seed *uint64 `json:"seed,omitempty"`
	// Interval is how often the answer is recomputed without a change, a
	// duration such as "30s"; empty means Config.DefaultInterval.
	Interval string `json:"interval,omitempty"`
}

// Update changes the evidence of a standing query. Without Replace, Clear
// removes items (clearing one that is not set is no error) and Set sets or
// changes items; with Replace the evidence becomes exactly Set.
type Update struct {
	Set     map[string]string `json:"set,omitempty"`
	Clear   []string          `json:"clear,omitempty"`
	Replace bool              `json:"replace,omitempty"`
	// ExpectRevision, when not 0, makes the update fail with
	// ErrRevisionMismatch unless the evidence is at this revision.
	ExpectRevision int64 `json:"expect_revision,omitempty"`
}

// Record is a standing query as a Store keeps it.
type Record struct {
	Key  Key  `json:"key"`
	Spec Spec `json:"spec"`
	// Interval is the recompute interval in force.
	Interval  time.Duration `json:"interval"`
	CreatedAt time.Time     `json:"created_at"`
	// Evidence and Revision are the current evidence and its revision
	// (1 at creation); EvidenceAt is when it last changed.
	Evidence   map[string]string `json:"evidence"`
	Revision   int64             `json:"revision"`
	EvidenceAt time.Time         `json:"evidence_at"`
	// Result is the latest successful outcome; Failure the latest failed
	// one, kept while no result answers its revision or a newer one.
	Result  *Outcome `json:"result,omitempty"`
	Failure *Outcome `json:"failure,omitempty"`
}

// Outcome is the end of one recompute.
type Outcome struct {
	// Revision is the evidence revision it answers, Evidence that evidence.
	Revision int64             `json:"revision"`
	Evidence map[string]string `json:"evidence"`
	// At is when the recompute finished.
	At time.Time `json:"at"`
	// Result is the result document; nil when Error is set.
	Result *infer.Result `json:"result,omitempty"`
	// Error says why the recompute failed.
	Error string `json:"error,omitempty"`
}

// Newer reports whether o should replace kept: it answers a newer revision,
// or the same one and finished later. Anything replaces nil.
func (o *Outcome) Newer(kept *Outcome) bool {
	if kept == nil {
		return true
	}
	return o.Revision > kept.Revision || o.Revision == kept.Revision && o.At.After(kept.At)
}

// lastAttempt is the latest outcome of either kind (nil when none).
func (r *Record) lastAttempt() (rev int64, at time.Time, any bool) {
	for _, o := range []*Outcome{r.Result, r.Failure} {
		if o == nil {
			continue
		}
		any = true
		rev = max(rev, o.Revision)
		if o.At.After(at) {
			at = o.At
		}
	}
	return rev, at, any
}

// NeedsRecompute reports whether r is due at now: no outcome answers its
// current revision, or the latest outcome is at least its interval old.
func (r *Record) NeedsRecompute(now time.Time) bool {
	rev, at, any := r.lastAttempt()
	if !any || rev < r.Revision {
		return true
	}
	return !now.Before(at.Add(r.Interval))
}

// Keep applies out to r as a store must: a result is kept when Newer than
// the kept result, and then drops a failure that it is at least as new as;
// a failure is kept when it answers at least the kept result's revision
// and is Newer than the kept failure. It reports whether out was kept.
func (r *Record) Keep(out *Outcome) bool {
	if out.Error == "" {
		if !out.Newer(r.Result) {
			return false
		}
		r.Result = out
		if r.Failure != nil && !r.Failure.Newer(out) {
			r.Failure = nil
		}
		return true
	}
	if r.Result != nil && out.Revision < r.Result.Revision || !out.Newer(r.Failure) {
		return false
	}
	r.Failure = out
	return true
}

// Status summarises r: pending, current, updating or failed.
func (r *Record) Status() string {
	switch {
	case r.Result != nil && r.Result.Revision >= r.Revision:
		return StatusCurrent
	case r.Failure != nil && r.Failure.Revision >= r.Revision:
		return StatusFailed
	case r.Result != nil:
		return StatusUpdating
	}
	return StatusPending
}

// clone returns a deep copy made through JSON, as a networked store would
// return it.
func (r *Record) clone() (*Record, error) {
	data, err := json.Marshal(r)
	if err != nil {
		return nil, err
	}
	var c Record
	if err := json.Unmarshal(data, &c); err != nil {
		return nil, err
	}
	return &c, nil
}

// View is a standing query as the transports show it: its registration,
// current evidence and revision, and its latest result document.
type View struct {
	ID       string            `json:"id"`
	Tenant   string            `json:"tenant,omitempty"`
	Model    string            `json:"model"`
	Targets  []string          `json:"targets"`
	Method   string            `json:"method"`
	Stop     infer.StopRule    `json:"stop,omitzero"`
	Seed     *uint64           `json:"seed,omitempty"`
	Interval string            `json:"interval"`
	Evidence map[string]string `json:"evidence"`
	// Revision is the evidence revision; EvidenceUpdatedAt when it changed.
	Revision          int64     `json:"revision"`
	EvidenceUpdatedAt time.Time `json:"evidence_updated_at"`
	CreatedAt         time.Time `json:"created_at"`
	// UpdatedAt is the latest of EvidenceUpdatedAt, ResultAt and ErrorAt.
	UpdatedAt time.Time `json:"updated_at"`
	// Status is pending, current, updating or failed.
	Status string `json:"status"`
	// Result is the latest result document (null before the first), with
	// the revision and evidence it answers, when it was computed and its
	// age when this view was made.
	Result           *infer.Result     `json:"result"`
	ResultRevision   int64             `json:"result_revision,omitempty"`
	ResultEvidence   map[string]string `json:"result_evidence,omitempty"`
	ResultAt         time.Time         `json:"result_at,omitzero"`
	ResultAgeSeconds *float64          `json:"result_age_seconds,omitempty"`
	// Error is why the latest recompute failed, when it did and no result
	// has answered its revision since; ErrorRevision and ErrorAt go with it.
	Error         string    `json:"error,omitempty"`
	ErrorRevision int64     `json:"error_revision,omitempty"`
	ErrorAt       time.Time `json:"error_at,omitzero"`
}

// NewView shapes r for the transports at time now.
func NewView(r *Record, now time.Time) *View {
	v := &View{
		ID: r.Key.ID, Tenant: r.Key.Tenant, Model: r.Spec.Model, Targets: slices.Clone(r.Spec.Targets),
		Method: r.Spec.Method, Stop: r.Spec.Stop, Seed: r.Spec.Seed, Interval: r.Interval.String(),
		Evidence: maps.Clone(r.Evidence), Revision: r.Revision, EvidenceUpdatedAt: r.EvidenceAt,
		CreatedAt: r.CreatedAt, Status: r.Status(),
	}
	if v.Evidence == nil {
		v.Evidence = map[string]string{}
	}
	if v.Method == "" {
		v.Method = infer.MethodAuto
	}
	if o := r.Result; o != nil {
		v.Result, v.ResultRevision, v.ResultEvidence, v.ResultAt = o.Result, o.Revision, maps.Clone(o.Evidence), o.At
		if v.ResultEvidence == nil {
			v.ResultEvidence = map[string]string{}
		}
		age := max(now.Sub(o.At).Seconds(), 0)
		v.ResultAgeSeconds = &age
	}
	if f := r.Failure; f != nil {
		v.Error, v.ErrorRevision, v.ErrorAt = f.Error, f.Revision, f.At
	}
	v.UpdatedAt = v.EvidenceUpdatedAt
	for _, t := range []time.Time{v.ResultAt, v.ErrorAt} {
		if t.After(v.UpdatedAt) {
			v.UpdatedAt = t
		}
	}
	return v
}

// DecodeSpec reads one JSON Spec of at most maxBytes bytes; unknown fields
// are rejected.
func DecodeSpec(r io.Reader, maxBytes int64) (*Spec, error) {
	var s Spec
	if err := decodeStrict(r, maxBytes, "standing query", &s); err != nil {
		return nil, err
	}
	return &s, nil
}

// DecodeUpdate reads one JSON Update of at most maxBytes bytes; unknown
// fields are rejected.
func DecodeUpdate(r io.Reader, maxBytes int64) (*Update, error) {
	var u Update
	if err := decodeStrict(r, maxBytes, "evidence update", &u); err != nil {
		return nil, err
	}
	return &u, nil
}

func decodeStrict(r io.Reader, maxBytes int64, what string, v any) error {
	if maxBytes <= 0 {
		maxBytes = 1 << 20
	}
	data, err := io.ReadAll(io.LimitReader(r, maxBytes+1))
	if err != nil {
		return fmt.Errorf("read %s: %w", what, err)
	}
	if int64(len(data)) > maxBytes {
		return fmt.Errorf("%w: %s document larger than %d bytes", infer.ErrBadQuery, what, maxBytes)
	}
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	if err := dec.Decode(v); err != nil {
		switch {
		case errors.Is(err, io.EOF):
			return fmt.Errorf("%w: empty %s document", infer.ErrBadQuery, what)
		case errors.Is(err, io.ErrUnexpectedEOF):
			return fmt.Errorf("%w: the %s document ends early (unbalanced braces or brackets?)", infer.ErrBadQuery, what)
		}
		return fmt.Errorf("%w: %s: %v", infer.ErrBadQuery, what, err)
	}
	if dec.More() {
		return fmt.Errorf("%w: unexpected data after the %s document", infer.ErrBadQuery, what)
	}
	return nil
}

// notFound is the error for a key the caller cannot see.
func notFound(k Key) error {
	return fmt.Errorf("standing query %q: %w", k.ID, jobs.ErrNotFound)
}
