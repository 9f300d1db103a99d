package web_test

import (
	"io"
	"net/http"
	"net/http/httptest"
	"regexp"
	"strings"
	"testing"

	"github.com/beliefd/beliefd/api/web"
)

// fallback stands in for the API's not-found handler.
var fallback = http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
	w.Header().Set("Content-Type", "application/json")
	w.WriteHeader(http.StatusTeapot)
})

func get(t *testing.T, h http.Handler, method, path string, hdr map[string]string) *http.Response {
	t.Helper()
	req := httptest.NewRequest(method, path, nil)
	for k, v := range hdr {
		req.Header.Set(k, v)
	}
	rec := httptest.NewRecorder()
	h.ServeHTTP(rec, req)
	return rec.Result()
}

func body(t *testing.T, r *http.Response) string {
	t.Helper()
	b, err := io.ReadAll(r.Body)
	if err != nil {
		t.Fatal(err)
	}
	return string(b)
}

// The page at / names its files under Prefix, each of which is served with
// its type and the content security policy; every module it imports is
// there too.
func TestPageAndFiles(t *testing.T) {
	h := web.Handler(fallback)
	r := get(t, h, "GET", "/", nil)
	page := body(t, r)
	if r.StatusCode != 200 || !strings.HasPrefix(r.Header.Get("Content-Type"), "text/html") {
		t.Fatalf("GET /: %d %s", r.StatusCode, r.Header.Get("Content-Type"))
	}
	if r.Header.Get("Content-Security-Policy") != web.ContentSecurityPolicy {
		t.Errorf("GET /: Content-Security-Policy %q", r.Header.Get("Content-Security-Policy"))
	}
	refs := regexp.MustCompile(`(?:src|href)="(/[^"]*)"`).FindAllStringSubmatch(page, -1)
	if len(refs) < 3 {
		t.Fatalf("the page references %d files: %v", len(refs), refs)
	}
	wantType := map[string]string{".js": "text/javascript", ".css": "text/css", ".svg": "image/svg+xml"}
	seen := map[string]bool{}
	queue := []string{}
	for _, m := range refs {
		queue = append(queue, m[1])
	}
	importRE := regexp.MustCompile(`(?m)^import .* from "\./([a-z]+\.js)";`)
	for len(queue) > 0 {
		p := queue[0]
		queue = queue[1:]
		if seen[p] {
			continue
		}
		seen[p] = true
		if !strings.HasPrefix(p, web.Prefix) {
			t.Errorf("%s is outside %s", p, web.Prefix)
			continue
		}
		r := get(t, h, "GET", p, nil)
		text := body(t, r)
		if r.StatusCode != 200 {
			t.Errorf("GET %s: %d", p, r.StatusCode)
			continue
		}
		for ext, ct := range wantType {
			if strings.HasSuffix(p, ext) && !strings.HasPrefix(r.Header.Get("Content-Type"), ct) {
				t.Errorf("GET %s: Content-Type %q, want %s", p, r.Header.Get("Content-Type"), ct)
			}
		}
		for _, m := range importRE.FindAllStringSubmatch(text, -1) {
			queue = append(queue, web.Prefix+m[1])
		}
	}
	for _, f := range []string{"app.js", "api.js", "graph.js", "plots.js", "fmt.js", "app.css"} {
		if !seen[web.Prefix+f] {
			t.Errorf("%s is not reached from the page", f)
		}
	}
}

// The page fetches nothing from other hosts: the only absolute URL in its
// files is the SVG namespace name.
func TestNoOtherHosts(t *testing.T) {
	h := web.Handler(fallback)
	abs := regexp.MustCompile(`(?:https?:)?//[a-zA-Z0-9.-]+\.[a-z]{2,}[^\s"'` + "`" + `)]*`)
	for _, f := range []string{"/", "/ui/app.js", "/ui/api.js", "/ui/graph.js", "/ui/plots.js", "/ui/fmt.js", "/ui/app.css", "/ui/mark.svg"} {
		text := body(t, get(t, h, "GET", f, nil))
		for _, u := range abs.FindAllString(text, -1) {
			if u != "http://www.w3.org/2000/svg" {
				t.Errorf("%s refers to %s", f, u)
			}
		}
	}
}

// Missing files and other methods go to the fallback, so errors keep the
// API's shape; a current copy gets 304.
func TestFallbackAndRevalidation(t *testing.T) {
	h := web.Handler(fallback)
	for _, c := range []struct{ method, path string }{
		{"GET", "/ui/missing.js"}, {"GET", "/ui/"}, {"GET", "/index.html"}, {"POST", "/"}, {"DELETE", "/ui/app.js"},
	} {
		if r := get(t, h, c.method, c.path, nil); r.StatusCode != http.StatusTeapot {
			t.Errorf("%s %s: %d, want the fallback", c.method, c.path, r.StatusCode)
		}
	}
	r := get(t, h, "GET", "/ui/app.js", nil)
	etag := r.Header.Get("ETag")
	if etag == "" || r.Header.Get("Cache-Control") != "no-cache" {
		t.Fatalf("ETag %q, Cache-Control %q", etag, r.Header.Get("Cache-Control"))
	}
	if r := get(t, h, "GET", "/ui/app.js", map[string]string{"If-None-Match": etag}); r.StatusCode != http.StatusNotModified {
		t.Errorf("If-None-Match the current ETag: %d, want 304", r.StatusCode)
	}
	if r := get(t, h, "HEAD", "/", nil); r.StatusCode != 200 || body(t, r) != "" {
		t.Errorf("HEAD /: %d", r.StatusCode)
	}
}
