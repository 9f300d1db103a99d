package httpapi

import (
	"context"
	"fmt"
	"io"
	"net/http"
	"net/url"
	"strconv"
	"strings"
	"time"

	"github.com/beliefd/beliefd/api/errmap"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/jobs"
	"google.golang.org/grpc/codes"
)

// Response headers of GET /v1/models/{name}.
const (
	HeaderModelName    = "Beliefd-Model-Name"
	HeaderModelVersion = "Beliefd-Model-Version"
	HeaderModelHash    = "Beliefd-Model-Hash"
	// HeaderIdempotencyKey may carry a job's idempotency key instead of the
	// query document's "idempotency_key" field.
	HeaderIdempotencyKey = "Idempotency-Key"
)

func (h *handler) createModel(w http.ResponseWriter, r *http.Request) {
	doc, err := io.ReadAll(http.MaxBytesReader(w, r.Body, h.opts.MaxModelBytes))
	if err != nil {
		h.fail(w, r, fmt.Errorf("read model: %w", err))
		return
	}
	info, created, err := h.svc.PutModel(r.Context(), doc)
	if err != nil {
		h.fail(w, r, err)
		return
	}
	status := http.StatusOK
	if created {
		status = http.StatusCreated
	}
	w.Header().Set("Location", "/v1/models/"+url.PathEscape(fmt.Sprintf("%s@%d", info.Name, info.Version)))
	h.writeJSON(w, status, info)
}

// modelList is the body of GET /v1/models.
type modelList struct {
	Models        []jobs.ModelInfo `json:"models"`
	NextPageToken string           `json:"next_page_token"`
}

func (h *handler) listModels(w http.ResponseWriter, r *http.Request) {
	token, size, err := page(r)
	if err != nil {
		h.fail(w, r, err)
		return
	}
	infos, next, err := h.svc.ListModels(r.Context(), token, size)
	if err != nil {
		h.fail(w, r, err)
		return
	}
	if infos == nil {
		infos = []jobs.ModelInfo{}
	}
	h.writeJSON(w, http.StatusOK, modelList{Models: infos, NextPageToken: next})
}

// page reads ?page_token= and ?page_size= (0 or absent: the service's default).
func page(r *http.Request) (string, int, error) {
	q := r.URL.Query()
	size := 0
	if s := q.Get("page_size"); s != "" {
		n, err := strconv.Atoi(s)
		if err != nil || n < 0 {
			return "", 0, errmap.Invalid("page_size", "%q is not a page size (want a whole number >= 0)", s)
		}
		size = n
	}
	return q.Get("page_token"), size, nil
}

func (h *handler) getModel(w http.ResponseWriter, r *http.Request) {
	ref := r.PathValue("name")
	if v := r.URL.Query().Get("version"); v != "" {
		n, err := strconv.Atoi(v)
		if err != nil || n < 1 {
			h.fail(w, r, errmap.Invalid("version", "%q is not a version (want a whole number >= 1)", v))
			return
		}
		if strings.Contains(ref, "@") {
			h.fail(w, r, errmap.Invalid("version", "give the version in the path (%q) or as ?version=, not both", ref))
			return
		}
		ref = fmt.Sprintf("%s@%d", ref, n)
	}
	info, doc, err := h.svc.GetModel(r.Context(), ref)
	if err != nil {
		h.fail(w, r, err)
		return
	}
	hd := w.Header()
	hd.Set("Content-Type", "application/json")
	hd.Set("ETag", strconv.Quote(info.Hash))
	hd.Set(HeaderModelName, info.Name)
	hd.Set(HeaderModelVersion, strconv.Itoa(info.Version))
	hd.Set(HeaderModelHash, info.Hash)
	if !info.CreatedAt.IsZero() {
		hd.Set("Last-Modified", info.CreatedAt.UTC().Format(http.TimeFormat))
	}
	w.WriteHeader(http.StatusOK)
	_, _ = w.Write(doc)
}

func (h *handler) deleteModel(w http.ResponseWriter, r *http.Request) {
	name := r.PathValue("name")
	if strings.Contains(name, "@") {
		h.fail(w, r, errmap.Invalid("name", "%q names a version: delete removes every version, give the name alone", name))
		return
	}
	if err := h.svc.DeleteModel(r.Context(), name); err != nil {
		h.fail(w, r, err)
		return
	}
	w.WriteHeader(http.StatusNoContent)
}

// readQuery reads a query document body (unknown fields rejected).
func (h *handler) readQuery(w http.ResponseWriter, r *http.Request) (*infer.Query, error) {
	return infer.DecodeQuery(http.MaxBytesReader(w, r.Body, h.opts.MaxQueryBytes), h.opts.MaxQueryBytes)
}

func (h *handler) submitJob(w http.ResponseWriter, r *http.Request) {
	q, err := h.readQuery(w, r)
	if err != nil {
		h.fail(w, r, err)
		return
	}
	if key := r.Header.Get(HeaderIdempotencyKey); key != "" {
		if q.IdempotencyKey != "" && q.IdempotencyKey != key {
			h.fail(w, r, errmap.Invalid("idempotency_key", "differs from the %s header; give one or make them equal", HeaderIdempotencyKey))
			return
		}
		q.IdempotencyKey = key
	}
	j, created, err := h.svc.Submit(r.Context(), q)
	if err != nil {
		h.fail(w, r, err)
		return
	}
	status := http.StatusAccepted
	if !created {
		status = http.StatusOK // an earlier submission with the same key
	}
	w.Header().Set("Location", "/v1/jobs/"+url.PathEscape(j.ID))
	h.writeJSON(w, status, newJobView(j))
}

// jobList is the body of GET /v1/jobs.
type jobList struct {
	Jobs          []jobInfo `json:"jobs"`
	NextPageToken string    `json:"next_page_token"`
}

func (h *handler) listJobs(w http.ResponseWriter, r *http.Request) {
	token, size, err := page(r)
	if err != nil {
		h.fail(w, r, err)
		return
	}
	js, next, err := h.svc.List(r.Context(), token, size)
	if err != nil {
		h.fail(w, r, err)
		return
	}
	out := jobList{Jobs: make([]jobInfo, len(js)), NextPageToken: next}
	for i, j := range js {
		out.Jobs[i] = newJobInfo(j)
	}
	h.writeJSON(w, http.StatusOK, out)
}

func (h *handler) getJob(w http.ResponseWriter, r *http.Request) {
	j, err := h.svc.Get(r.Context(), r.PathValue("id"))
	if err != nil {
		h.fail(w, r, err)
		return
	}
	h.writeJSON(w, http.StatusOK, newJobView(j))
}

func (h *handler) cancelJob(w http.ResponseWriter, r *http.Request) {
	j, err := h.svc.Cancel(r.Context(), r.PathValue("id"))
	if err != nil {
		h.fail(w, r, err)
		return
	}
	h.writeJSON(w, http.StatusOK, newJobView(j))
}

func (h *handler) query(w http.ResponseWriter, r *http.Request) {
	timeout := h.opts.QueryTimeout
	if s := r.URL.Query().Get("timeout"); s != "" {
		d, err := time.ParseDuration(s)
		switch {
		case err != nil:
			h.fail(w, r, errmap.Invalid("timeout", "%q is not a duration such as \"30s\" or \"2m\"", s))
			return
		case d <= 0:
			h.fail(w, r, errmap.Invalid("timeout", "%q must be positive", s))
			return
		case d > h.opts.MaxQueryTimeout:
			h.fail(w, r, errmap.Invalid("timeout", "%s exceeds the limit of %s; submit a job for longer runs", d, h.opts.MaxQueryTimeout))
			return
		}
		timeout = d
	}
	q, err := h.readQuery(w, r)
	if err != nil {
		h.fail(w, r, err)
		return
	}
	ctx, cancel := context.WithTimeout(r.Context(), timeout)
	defer cancel()
	res, err := h.svc.Query(ctx, q)
	if err != nil {
		h.fail(w, r, err)
		return
	}
	h.writeJSON(w, http.StatusOK, res)
}

func (h *handler) healthz(w http.ResponseWriter, r *http.Request) {
	h.writeJSON(w, http.StatusOK, map[string]string{"status": "ok"})
}

func (h *handler) readyz(w http.ResponseWriter, r *http.Request) {
	ctx, cancel := context.WithTimeout(r.Context(), h.opts.ReadyTimeout)
	defer cancel()
	if err := h.svc.Ready(ctx); err != nil {
		h.log.Warn("http: not ready", "err", err)
		h.writeError(w, errmap.Error{HTTPStatus: http.StatusServiceUnavailable, Code: codes.Unavailable, Reason: "NOT_READY",
			Message: "not ready: the job store cannot be reached"})
		return
	}
	h.writeJSON(w, http.StatusOK, map[string]string{"status": "ready"})
}
