// Package web serves beliefd's live web page: the models with a drawing of
// each network, the jobs with posteriors and a convergence plot that update
// from the job's event stream, a form that submits a query, and the
// standing queries with their latest posteriors.
//
// The page is plain HTML, CSS and JavaScript embedded in the binary (no
// build step, no requests to other hosts). It talks to the HTTP API under
// /v1/ like any other client; when the API asks for a bearer token, the
// page sends the one typed into its token field, which it keeps in the
// browser's session storage only. The page itself needs no token and
// contains no secrets.
//
// Handler serves the page at "/" and its files under Prefix; api/httpapi
// mounts it.
package web

import (
	"bytes"
	"crypto/sha256"
	"embed"
	"encoding/hex"
	"fmt"
	"io/fs"
	"mime"
	"net/http"
	"path"
	"strings"
	"time"
)

// Prefix is the path under which the page's files are served.
const Prefix = "/ui/"

// ContentSecurityPolicy is sent with every file: scripts, styles and
// connections from this origin only, no inline script, no framing.
const ContentSecurityPolicy = "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; " +
	"connect-src 'self'; font-src 'self'; base-uri 'none'; form-action 'none'; frame-ancestors 'none'"

//go:embed static
var static embed.FS

// file is one embedded file, ready to serve.
type file struct {
	name  string
	body  []byte
	etag  string
	ctype string
}

// files maps a request path ("/" or Prefix+name) to its file.
var files = func() map[string]*file {
	m := map[string]*file{}
	err := fs.WalkDir(static, "static", func(p string, d fs.DirEntry, err error) error {
		if err != nil || d.IsDir() {
			return err
		}
		body, err := static.ReadFile(p)
		if err != nil {
			return fmt.Errorf("web: read embedded %s: %w", p, err)
		}
		sum := sha256.Sum256(body)
		ctype := mime.TypeByExtension(path.Ext(p))
		if ctype == "" {
			ctype = http.DetectContentType(body)
		}
		name := strings.TrimPrefix(p, "static/")
		f := &file{name: name, body: body, etag: `"` + hex.EncodeToString(sum[:8]) + `"`, ctype: ctype}
		m[Prefix+name] = f
		if name == "index.html" {
			m["/"] = f
		}
		return nil
	})
	if err != nil {
		panic(err) // the embedded tree is part of the binary: unreadable means a broken build
	}
	return m
}()

// Handler serves the page at "/" and its files under Prefix, for GET and
// HEAD. Any other path, including a missing file, goes to notFound, so
// that errors keep the API's one shape.
func Handler(notFound http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		f, ok := files[r.URL.Path]
		if !ok || (r.Method != http.MethodGet && r.Method != http.MethodHead) {
			notFound.ServeHTTP(w, r)
			return
		}
		h := w.Header()
		h.Set("Content-Type", f.ctype)
		h.Set("ETag", f.etag)
		// Revalidate each time: a new binary may carry a new page.
		h.Set("Cache-Control", "no-cache")
		h.Set("Content-Security-Policy", ContentSecurityPolicy)
		h.Set("X-Content-Type-Options", "nosniff")
		h.Set("Referrer-Policy", "no-referrer")
		http.ServeContent(w, r, f.name, time.Time{}, bytes.NewReader(f.body))
	})
}
