package httpapi

import (
	"context"
	"fmt"
	"net/http"
	"net/url"
	"time"

	"github.com/beliefd/beliefd/api"
	"github.com/beliefd/beliefd/api/errmap"
	"github.com/beliefd/beliefd/service/standing"
)

// standingHandler serves /v1/standing-queries.
type standingHandler struct {
	*handler
	svc api.StandingService
}

// routeStanding registers the standing-query routes on mux, each with a
// 405 in the error shape for the other methods.
func (h *handler) routeStanding(mux *http.ServeMux, svc api.StandingService) {
	sh := &standingHandler{handler: h, svc: svc}
	h.register(mux, []routePath{
		{"/v1/standing-queries", []route{{"POST", sh.create}, {"GET", sh.list}}},
		{"/v1/standing-queries/{id}", []route{{"GET", sh.get}, {"DELETE", sh.delete}}},
		{"/v1/standing-queries/{id}/evidence", []route{{"PATCH", sh.update}, {"POST", sh.update}}},
	})
}

// scoped returns the request's context, addressing the tenant of
// ?tenant= when given (an admin's way to reach another tenant's).
func scoped(r *http.Request) context.Context {
	if q := r.URL.Query(); q.Has("tenant") {
		return standing.WithTenant(r.Context(), q.Get("tenant"))
	}
	return r.Context()
}

// waitParam reads ?wait=DURATION (0 when absent).
func waitParam(r *http.Request) (time.Duration, error) {
	s := r.URL.Query().Get("wait")
	if s == "" {
		return 0, nil
	}
	d, err := time.ParseDuration(s)
	switch {
	case err != nil:
		return 0, errmap.Invalid("wait", "%q is not a duration such as \"2s\"", s)
	case d <= 0:
		return 0, errmap.Invalid("wait", "%q must be positive", s)
	case d > api.MaxStandingWait:
		return 0, errmap.Invalid("wait", "%s exceeds the limit of %s", d, api.MaxStandingWait)
	}
	return d, nil
}

// standingList is the body of GET /v1/standing-queries.
type standingList struct {
	StandingQueries []*standing.View `json:"standing_queries"`
}

func (h *standingHandler) create(w http.ResponseWriter, r *http.Request) {
	wait, err := waitParam(r)
	if err != nil {
		h.fail(w, r, err)
		return
	}
	spec, err := standing.DecodeSpec(http.MaxBytesReader(w, r.Body, h.opts.MaxQueryBytes), h.opts.MaxQueryBytes)
	if err != nil {
		h.fail(w, r, err)
		return
	}
	ctx := scoped(r)
	v, err := h.svc.Create(ctx, spec)
	if err != nil {
		h.fail(w, r, err)
		return
	}
	if wait > 0 {
		if v, err = h.svc.Wait(ctx, v.ID, v.Revision, wait); err != nil {
			h.fail(w, r, err)
			return
		}
	}
	w.Header().Set("Location", "/v1/standing-queries/"+url.PathEscape(v.ID))
	h.writeJSON(w, http.StatusCreated, v)
}

func (h *standingHandler) list(w http.ResponseWriter, r *http.Request) {
	vs, err := h.svc.List(scoped(r))
	if err != nil {
		h.fail(w, r, err)
		return
	}
	if vs == nil {
		vs = []*standing.View{}
	}
	h.writeJSON(w, http.StatusOK, standingList{StandingQueries: vs})
}

func (h *standingHandler) get(w http.ResponseWriter, r *http.Request) {
	v, err := h.svc.Get(scoped(r), r.PathValue("id"))
	if err != nil {
		h.fail(w, r, err)
		return
	}
	h.writeJSON(w, http.StatusOK, v)
}

func (h *standingHandler) delete(w http.ResponseWriter, r *http.Request) {
	if err := h.svc.Delete(scoped(r), r.PathValue("id")); err != nil {
		h.fail(w, r, err)
		return
	}
	w.WriteHeader(http.StatusNoContent)
}

func (h *standingHandler) update(w http.ResponseWriter, r *http.Request) {
	wait, err := waitParam(r)
	if err != nil {
		h.fail(w, r, err)
		return
	}
	u, err := standing.DecodeUpdate(http.MaxBytesReader(w, r.Body, h.opts.MaxQueryBytes), h.opts.MaxQueryBytes)
	if err != nil {
		h.fail(w, r, fmt.Errorf("update evidence of standing query %q: %w", r.PathValue("id"), err))
		return
	}
	ctx := scoped(r)
	v, err := h.svc.UpdateEvidence(ctx, r.PathValue("id"), u)
	if err != nil {
		h.fail(w, r, err)
		return
	}
	if wait > 0 {
		if v, err = h.svc.Wait(ctx, v.ID, v.Revision, wait); err != nil {
			h.fail(w, r, err)
			return
		}
	}
	h.writeJSON(w, http.StatusOK, v)
}
