package main

import (
	"bytes"
	"encoding/json"
	"fmt"
	"io"
	"net/http"
	"regexp"
	"strconv"
	"time"
)

// client talks to one beliefd HTTP API.
type client struct {
	base string
	hc   *http.Client
}

func newClient(base string, conns int) *client {
	return &client{base: base, hc: &http.Client{
		Timeout:   30 * time.Second,
		Transport: &http.Transport{MaxIdleConnsPerHost: max(conns, 2)},
	}}
}

// do makes one request and reads the whole answer.
func (c *client) do(method, path string, body []byte) (int, []byte, error) {
	var r io.Reader
	if body != nil {
		r = bytes.NewReader(body)
	}
	req, err := http.NewRequest(method, c.base+path, r)
	if err != nil {
		return 0, nil, err
	}
	if body != nil {
		req.Header.Set("Content-Type", "application/json")
	}
	resp, err := c.hc.Do(req)
	if err != nil {
		return 0, nil, err
	}
	defer resp.Body.Close()
	data, err := io.ReadAll(resp.Body)
	return resp.StatusCode, data, err
}

// jobView is what beliefd-load reads of GET /v1/jobs/{id}.
type jobView struct {
	ID      string `json:"id"`
	State   string `json:"state"`
	Samples int64  `json:"samples"`
	Job     struct {
		Blocks       int64     `json:"blocks"`
		MergedBlocks int64     `json:"merged_blocks"`
		Error        string    `json:"error"`
		StartedAt    time.Time `json:"started_at"`
		FinishedAt   time.Time `json:"finished_at"`
	} `json:"job"`
}

func (v *jobView) ended() bool {
	return v.State == "succeeded" || v.State == "failed" || v.State == "cancelled"
}

func (c *client) getJob(id string) (*jobView, error) {
	status, data, err := c.do("GET", "/v1/jobs/"+id, nil)
	if err != nil {
		return nil, fmt.Errorf("get job %s: %w", id, err)
	}
	if status != http.StatusOK {
		return nil, fmt.Errorf("get job %s: %d %s", id, status, data)
	}
	v := &jobView{}
	if err := json.Unmarshal(data, v); err != nil {
		return nil, fmt.Errorf("get job %s: %w", id, err)
	}
	return v, nil
}

// submit posts a job and returns its ID.
func (c *client) submit(query []byte) (string, error) {
	status, data, err := c.do("POST", "/v1/jobs", query)
	if err != nil {
		return "", fmt.Errorf("submit: %w", err)
	}
	if status != http.StatusAccepted && status != http.StatusOK {
		return "", fmt.Errorf("submit: %d %s", status, data)
	}
	var v jobView
	if err := json.Unmarshal(data, &v); err != nil || v.ID == "" {
		return "", fmt.Errorf("submit: unreadable answer %s", data)
	}
	return v.ID, nil
}

// putModel stores a model document.
func (c *client) putModel(doc []byte) error {
	status, data, err := c.do("POST", "/v1/models", doc)
	if err != nil {
		return fmt.Errorf("put model: %w", err)
	}
	if status != http.StatusCreated && status != http.StatusOK {
		return fmt.Errorf("put model: %d %s", status, data)
	}
	return nil
}

var queueDepthRe = regexp.MustCompile(`(?m)^beliefd_queue_depth (\S+)$`)

// queueDepth reads beliefd_queue_depth from /metrics.
func (c *client) queueDepth() (float64, error) {
	status, data, err := c.do("GET", "/metrics", nil)
	if err != nil {
		return 0, err
	}
	if status != http.StatusOK {
		return 0, fmt.Errorf("metrics: %d", status)
	}
	m := queueDepthRe.FindSubmatch(data)
	if m == nil {
		return 0, fmt.Errorf("metrics: no beliefd_queue_depth")
	}
	return strconv.ParseFloat(string(m[1]), 64)
}
