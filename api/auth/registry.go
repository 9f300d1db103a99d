package auth

import (
	"bytes"
	"context"
	"crypto/rand"
	"crypto/sha256"
	"crypto/subtle"
	"encoding/base64"
	"encoding/hex"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"log/slog"
	"maps"
	"math"
	"slices"
	"strings"
	"sync/atomic"
	"time"

	"github.com/beliefd/beliefd/service/jobs"
)

// Roles of a token.
const (
	RoleMember = "member"
	RoleAdmin  = "admin"
	// RoleMetrics may only read the Prometheus metrics, and only when
	// serve requires a token for them (--metrics-need-token); it calls no API.
	RoleMetrics = "metrics"
)

// TokenPrefix starts every token that NewToken mints.
const TokenPrefix = "bfd1_"

// MaxDocumentBytes bounds a tenants document.
const MaxDocumentBytes = 4 << 20

// ErrBadDocument is wrapped by the errors of ParseDocument.
var ErrBadDocument = errors.New("bad tenants document")

// Document is the tenants document (see the package documentation).
type Document struct {
	Tenants map[string]jobs.TenantPolicy `json:"tenants"`
	Tokens  []TokenEntry                 `json:"tokens"`
}

// TokenEntry is one token of the tenants document: the hex SHA-256 of the
// token, never the token itself.
type TokenEntry struct {
	Label  string `json:"label,omitempty"`
	Tenant string `json:"tenant"`
	Role   string `json:"role"`
	SHA256 string `json:"sha256"`
}

// NewToken mints a token: TokenPrefix and 256 random bits in base64url.
func NewToken() (string, error) {
	var b [32]byte
	if _, err := rand.Read(b[:]); err != nil {
		return "", fmt.Errorf("new token: %w", err)
	}
	return TokenPrefix + base64.RawURLEncoding.EncodeToString(b[:]), nil
}

// HashToken is the hex SHA-256 of a token, as the tenants document keeps it.
func HashToken(token string) string {
	sum := sha256.Sum256([]byte(token))
	return hex.EncodeToString(sum[:])
}

// ParseDocument decodes and checks a tenants document. Unknown fields are
// refused; an error names the entry and the field at fault (never a hash).
func ParseDocument(data []byte) (*Document, error) {
	if len(data) > MaxDocumentBytes {
		return nil, fmt.Errorf("%w: %d bytes exceeds the limit of %d", ErrBadDocument, len(data), MaxDocumentBytes)
	}
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	var d Document
	if err := dec.Decode(&d); err != nil {
		return nil, fmt.Errorf("%w: %v", ErrBadDocument, err)
	}
	if _, err := dec.Token(); !errors.Is(err, io.EOF) {
		return nil, fmt.Errorf("%w: data after the document", ErrBadDocument)
	}
	bad := func(format string, a ...any) error {
		return fmt.Errorf("%w: "+format, append([]any{ErrBadDocument}, a...)...)
	}
	for _, name := range slices.Sorted(maps.Keys(d.Tenants)) {
		p := d.Tenants[name]
		if err := jobs.CheckTenantName(name); err != nil {
			return nil, bad("tenants: %v", err)
		}
		switch {
		case p.MaxUnfinished < 0:
			return nil, bad("tenants[%s].max_unfinished %d: want 0 (no limit) or more", name, p.MaxUnfinished)
		case p.MaxSamplesPerJob < 0:
			return nil, bad("tenants[%s].max_samples_per_job %d: want 0 (no limit) or more", name, p.MaxSamplesPerJob)
		case p.MaxModelBytes < 0:
			return nil, bad("tenants[%s].max_model_bytes %d: want 0 (no limit) or more", name, p.MaxModelBytes)
		case p.Share < 0 || math.IsInf(p.Share, 0) || math.IsNaN(p.Share):
			return nil, bad("tenants[%s].share %v: want a positive number (0 or absent: 1)", name, p.Share)
		}
	}
	seen := map[string]int{}
	for i, t := range d.Tokens {
		where := fmt.Sprintf("tokens[%d]", i)
		if t.Label != "" {
			where += fmt.Sprintf(" (label %q)", t.Label)
		}
		if _, ok := d.Tenants[t.Tenant]; !ok {
			return nil, bad("%s: tenant %q is not listed under \"tenants\"", where, t.Tenant)
		}
		if t.Role != RoleMember && t.Role != RoleAdmin && t.Role != RoleMetrics {
			return nil, bad("%s: role %q: want %q, %q or %q", where, t.Role, RoleMember, RoleAdmin, RoleMetrics)
		}
		h := strings.ToLower(t.SHA256)
		if b, err := hex.DecodeString(h); err != nil || len(b) != sha256.Size {
			return nil, bad("%s: sha256 is not 64 hex digits (give the hash of the token, as 'beliefd token' prints it, never the token)", where)
		}
		if j, dup := seen[h]; dup {
			return nil, bad("%s: the same sha256 as tokens[%d]", where, j)
		}
		seen[h] = i
		d.Tokens[i].SHA256 = h
	}
	return &d, nil
}

// snapshot is one tenants document, prepared for lookups.
type snapshot struct {
	doc    *Document
	hashes [][sha256.Size]byte // hashes[i] is doc.Tokens[i]'s
	sum    [sha256.Size]byte   // of the document's bytes
}

// Registry holds the tenants document in force. It is safe for concurrent
// use; Load and Follow replace the document as a whole.
type Registry struct {
	cur atomic.Pointer[snapshot]
}

// NewRegistry returns a Registry holding the document data.
func NewRegistry(data []byte) (*Registry, error) {
	r := &Registry{}
	if _, err := r.Load(data); err != nil {
		return nil, err
	}
	return r, nil
}

// Load parses data and puts it in force; changed is false when data is
// the document already in force. An invalid document changes nothing.
func (r *Registry) Load(data []byte) (changed bool, err error) {
	sum := sha256.Sum256(data)
	if cur := r.cur.Load(); cur != nil && cur.sum == sum {
		return false, nil
	}
	d, err := ParseDocument(data)
	if err != nil {
		return false, err
	}
	s := &snapshot{doc: d, sum: sum, hashes: make([][sha256.Size]byte, len(d.Tokens))}
	for i, t := range d.Tokens {
		b, _ := hex.DecodeString(t.SHA256)
		copy(s.hashes[i][:], b)
	}
	r.cur.Store(s)
	return true, nil
}

// Tenants lists the tenants of the document in force, in name order.
func (r *Registry) Tenants() []string {
	return slices.Sorted(maps.Keys(r.cur.Load().doc.Tenants))
}

// Tokens counts the tokens of the document in force.
func (r *Registry) Tokens() int { return len(r.cur.Load().doc.Tokens) }

// Policy returns a tenant's quotas (the zero policy for a tenant not listed).
func (r *Registry) Policy(tenant string) jobs.TenantPolicy {
	return r.cur.Load().doc.Tenants[tenant]
}

// identity is what a token stands for.
type identity struct {
	principal jobs.Principal
	label     string
	// metricsOnly: the token has RoleMetrics.
	metricsOnly bool
}

// lookup finds the entry of token. It hashes the token and compares the
// hash with every known hash in constant time, going through all of them
// whether or not one matched.
func (r *Registry) lookup(token string) (identity, bool) {
	s := r.cur.Load()
	sum := sha256.Sum256([]byte(token))
	found := -1
	for i := range s.hashes {
		if subtle.ConstantTimeCompare(sum[:], s.hashes[i][:]) == 1 {
			found = i
		}
	}
	if found < 0 {
		return identity{}, false
	}
	t := s.doc.Tokens[found]
	return identity{principal: jobs.Principal{Tenant: t.Tenant, Admin: t.Role == RoleAdmin}, label: t.Label, metricsOnly: t.Role == RoleMetrics}, true
}

// Follow reads the document with fetch every interval until ctx ends and
// puts it in force when it changed. A fetch that fails or a document that
// is invalid keeps the one in force and is logged (the error names the
// entry at fault, never a token or its hash) when the failure starts or
// changes.
func (r *Registry) Follow(ctx context.Context, fetch func(context.Context) ([]byte, error), every time.Duration, log *slog.Logger) {
	t := time.NewTicker(every)
	defer t.Stop()
	failing := ""
	for {
		select {
		case <-ctx.Done():
			return
		case <-t.C:
		}
		data, err := fetch(ctx)
		if err == nil {
			var changed bool
			if changed, err = r.Load(data); err == nil && changed {
				log.Info("tenants document reloaded", "tenants", len(r.Tenants()), "tokens", r.Tokens())
			}
		}
		switch {
		case err != nil && ctx.Err() == nil && err.Error() != failing:
			log.Warn("tenants document not reloaded; the one in force stays", "err", err)
			failing = err.Error()
		case err == nil && failing != "":
			log.Info("tenants document readable again")
			failing = ""
		}
	}
}
