package httpapi

import (
	"context"
	"encoding/json"
	"fmt"
	"net/http"
	"time"

	"github.com/beliefd/beliefd/api/errmap"
	"github.com/beliefd/beliefd/api/internal/latest"
	"google.golang.org/grpc/codes"
)

// Event names of GET /v1/jobs/{id}/events.
const (
	EventUpdate = "update" // the job's latest state, not terminal
	EventFinal  = "final"  // the terminal state; the stream ends after it
	EventError  = "error"  // the stream ends early; data is the error shape
)

// jobEvents streams a job as Server-Sent Events: one "update" event with
// the job view now and after each change (a slow reader gets the latest,
// not a backlog), a "final" event with the terminal state, then the end of
// the response. Comment lines keep idle connections open.
func (h *handler) jobEvents(w http.ResponseWriter, r *http.Request) {
	ctx, cancel := context.WithCancel(r.Context())
	defer cancel() // ends the service's watch and the coalescing goroutine
	updates, err := h.svc.Watch(ctx, r.PathValue("id"))
	if err != nil {
		h.fail(w, r, err)
		return
	}
	rc := http.NewResponseController(w)
	// An event stream lasts as long as its job: lift the server's write
	// timeout for this response where the server allows it.
	_ = rc.SetWriteDeadline(time.Time{})
	hd := w.Header()
	hd.Set("Content-Type", "text/event-stream")
	hd.Set("Cache-Control", "no-cache")
	hd.Set("X-Accel-Buffering", "no")
	w.WriteHeader(http.StatusOK)
	if r.Method == http.MethodHead {
		return
	}
	if err := rc.Flush(); err != nil {
		return
	}

	heartbeat := time.NewTicker(h.opts.Heartbeat)
	defer heartbeat.Stop()
	coalesced := latest.Coalesce(ctx, updates)
	for {
		select {
		case j, ok := <-coalesced:
			if !ok {
				if ctx.Err() == nil {
					// The service ended the watch before a terminal state.
					h.writeEvent(w, rc, EventError, errorBody{Error: errorDetail{Status: http.StatusServiceUnavailable,
						Code: errmap.CodeName(codes.Unavailable), Reason: "WATCH_ENDED",
						Message: "the watch ended before the job finished; reconnect", FieldViolations: []errmap.FieldViolation{}}})
				}
				return
			}
			name := EventUpdate
			if j.State.Terminal() {
				name = EventFinal
			}
			if err := h.writeEvent(w, rc, name, newJobView(j)); err != nil || name == EventFinal {
				return
			}
		case <-heartbeat.C:
			if _, err := fmt.Fprint(w, ": heartbeat\n\n"); err != nil {
				return
			}
			if err := rc.Flush(); err != nil {
				return
			}
		case <-ctx.Done():
			return
		}
	}
}

// writeEvent writes one event whose data is v as JSON on one line.
func (h *handler) writeEvent(w http.ResponseWriter, rc *http.ResponseController, name string, v any) error {
	data, err := json.Marshal(v)
	if err != nil {
		h.log.Error("http: encode event", "err", err)
		return err
	}
	if _, err := fmt.Fprintf(w, "event: %s\ndata: %s\n\n", name, data); err != nil {
		return err
	}
	return rc.Flush()
}
