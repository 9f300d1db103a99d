package main

import (
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/json"
	"encoding/pem"
	"fmt"
	"io"
	"math/big"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"regexp"
	"strings"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"

	"github.com/beliefd/beliefd/api/auth"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/worker/redisstore/redistest"
)

func TestServeAccessSettings(t *testing.T) {
	dir := t.TempDir()
	noTokens := filepath.Join(dir, "no-tokens.json")
	if err := os.WriteFile(noTokens, []byte(`{"tenants": {"alpha": {}}, "tokens": []}`), 0o600); err != nil {
		t.Fatal(err)
	}
	badDoc := filepath.Join(dir, "bad.json")
	if err := os.WriteFile(badDoc, []byte(`{"tenants": {"alpha": {}}, "tokens": [{"tenant": "alpha", "role": "owner", "sha256": "`+auth.HashToken("t")+`"}]}`), 0o600); err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct {
		args []string
		code int
		want string
	}{
		{[]string{"serve", "--http-addr", ":0"}, 2, "--http-addr :0 is not a loopback address and no tokens are configured"},
		{[]string{"serve", "--grpc-addr", "0.0.0.0:0"}, 2, "--allow-open-access"},
		{[]string{"serve", "--tls-cert", "c.pem"}, 2, "--tls-cert and --tls-key go together"},
		{[]string{"serve", "--tenants-file", "a.json", "--tenants-redis-key", "k", "--redis", "redis://127.0.0.1:1/0"}, 2, "not both"},
		{[]string{"serve", "--tenants-redis-key", "k"}, 2, "--tenants-redis-key \"k\" needs --redis"},
		{[]string{"serve", "--tenants-file", "a.json", "--tenants-reload", "10ms"}, 2, "--tenants-reload 10ms"},
		{[]string{"serve", "--tenants-file", filepath.Join(dir, "missing.json")}, 1, "--tenants-file " + filepath.Join(dir, "missing.json")},
		{[]string{"serve", "--tenants-file", noTokens}, 1, "lists no tokens"},
		{[]string{"serve", "--tenants-file", badDoc}, 1, `tokens[0]: role "owner"`},
		{[]string{"serve", "--tenants-file", noTokens, "--tls-cert", filepath.Join(dir, "c.pem"), "--tls-key", filepath.Join(dir, "k.pem")}, 1, "--tenants-file"},
	} {
		code, _, errs := runCLI(t, tc.args...)
		if code != tc.code || !strings.Contains(errs, tc.want) {
			t.Errorf("%v: exit %d, stderr %q; want exit %d naming %q", tc.args, code, errs, tc.code, tc.want)
		}
	}
	for _, addr := range []string{"127.0.0.1:8080", "[::1]:8080", "localhost:9090"} {
		if !loopbackAddr(addr) {
			t.Errorf("%s is not taken for loopback", addr)
		}
	}
	for _, addr := range []string{":8080", "0.0.0.0:8080", "[::]:8080", "10.1.2.3:8080", "example.internal:8080", "nonsense"} {
		if loopbackAddr(addr) {
			t.Errorf("%s is taken for loopback", addr)
		}
	}
}

func TestTokenCommand(t *testing.T) {
	code, out, errs := runCLI(t, "token", "--tenant", "payments", "--role", "admin", "--label", "oncall")
	if code != 0 {
		t.Fatalf("token: exit %d: %s", code, errs)
	}
	tok := regexp.MustCompile(`(?m)^  (bfd1_[A-Za-z0-9_-]{43})$`).FindStringSubmatch(out)
	entry := regexp.MustCompile(`(?m)^  (\{.*\})$`).FindStringSubmatch(out)
	if tok == nil || entry == nil {
		t.Fatalf("token output:\n%s", out)
	}
	var e auth.TokenEntry
	if err := json.Unmarshal([]byte(entry[1]), &e); err != nil {
		t.Fatal(err)
	}
	if e != (auth.TokenEntry{Label: "oncall", Tenant: "payments", Role: auth.RoleAdmin, SHA256: auth.HashToken(tok[1])}) {
		t.Errorf("entry %+v does not match the token", e)
	}
	if strings.Count(out, tok[1]) != 1 {
		t.Error("the token is printed more than once")
	}
	// The entry goes into a document as it is.
	doc := `{"tenants": {"payments": {}}, "tokens": [` + entry[1] + `]}`
	if _, err := auth.ParseDocument([]byte(doc)); err != nil {
		t.Errorf("the printed entry does not parse: %v", err)
	}
	for _, args := range [][]string{{"token"}, {"token", "--tenant", "a/b"}, {"token", "--tenant", "a", "--role", "owner"}} {
		if code, _, errs := runCLI(t, args...); code != 2 {
			t.Errorf("%v: exit %d (%s), want 2", args, code, errs)
		}
	}
}

// writeTLS writes a CA certificate and a server certificate and key for
// 127.0.0.1 as PEM files.
func writeTLS(t *testing.T, dir string) (caFile, certFile, keyFile string) {
	t.Helper()
	now := time.Now()
	caKey, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	caTmpl := &x509.Certificate{SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: "beliefd test CA"},
		NotBefore: now.Add(-time.Hour), NotAfter: now.Add(time.Hour), IsCA: true, BasicConstraintsValid: true, KeyUsage: x509.KeyUsageCertSign}
	caDER, err := x509.CreateCertificate(rand.Reader, caTmpl, caTmpl, &caKey.PublicKey, caKey)
	if err != nil {
		t.Fatal(err)
	}
	ca, _ := x509.ParseCertificate(caDER)
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	leaf := &x509.Certificate{SerialNumber: big.NewInt(2), Subject: pkix.Name{CommonName: "beliefd"},
		NotBefore: now.Add(-time.Hour), NotAfter: now.Add(time.Hour), IPAddresses: []net.IP{net.IPv4(127, 0, 0, 1)},
		DNSNames: []string{"localhost"}, KeyUsage: x509.KeyUsageDigitalSignature, ExtKeyUsage: []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth}}
	der, err := x509.CreateCertificate(rand.Reader, leaf, ca, &key.PublicKey, caKey)
	if err != nil {
		t.Fatal(err)
	}
	keyDER, err := x509.MarshalECPrivateKey(key)
	if err != nil {
		t.Fatal(err)
	}
	write := func(name, typ string, b []byte) string {
		p := filepath.Join(dir, name)
		if err := os.WriteFile(p, pem.EncodeToMemory(&pem.Block{Type: typ, Bytes: b}), 0o600); err != nil {
			t.Fatal(err)
		}
		return p
	}
	return write("ca.pem", "CERTIFICATE", caDER), write("cert.pem", "CERTIFICATE", der), write("key.pem", "EC PRIVATE KEY", keyDER)
}

// serve with a tenants file and TLS, and the client commands with --token
// and --ca.
func TestServeWithTokensAndTLS(t *testing.T) {
	if testing.Short() {
		t.Skip("starts processes")
	}
	dir := t.TempDir()
	caFile, certFile, keyFile := writeTLS(t, dir)
	alpha, _ := auth.NewToken()
	admin, _ := auth.NewToken()
	doc, _ := json.Marshal(auth.Document{
		Tenants: map[string]jobs.TenantPolicy{"alpha": {MaxSamplesPerJob: 100000}, "ops": {}},
		Tokens: []auth.TokenEntry{{Label: "alpha-ci", Tenant: "alpha", Role: auth.RoleMember, SHA256: auth.HashToken(alpha)},
			{Label: "oncall", Tenant: "ops", Role: auth.RoleAdmin, SHA256: auth.HashToken(admin)}},
	})
	tenants := filepath.Join(dir, "tenants.json")
	if err := os.WriteFile(tenants, doc, 0o600); err != nil {
		t.Fatal(err)
	}
	p := startProc(t, "serve", "--http-addr", "127.0.0.1:0", "--grpc-addr", "127.0.0.1:0", "--workers", "1",
		"--tenants-file", tenants, "--tls-cert", certFile, "--tls-key", keyFile)
	m := p.waitFor(t, regexp.MustCompile(`serving on (https://[0-9.:]+) \(HTTP\) and ([0-9.:]+) \(gRPC\)`), 30*time.Second)
	httpURL, grpcAddr := m[1], m[2]
	p.waitFor(t, regexp.MustCompile(`tokens required`), 5*time.Second)

	pool := x509.NewCertPool()
	caPEM, _ := os.ReadFile(caFile)
	pool.AppendCertsFromPEM(caPEM)
	hc := &http.Client{Transport: &http.Transport{TLSClientConfig: &tls.Config{RootCAs: pool}}}
	get := func(path, token string) (int, string) {
		req, _ := http.NewRequest("GET", httpURL+path, nil)
		if token != "" {
			req.Header.Set("Authorization", "Bearer "+token)
		}
		resp, err := hc.Do(req)
		if err != nil {
			t.Fatal(err)
		}
		defer resp.Body.Close()
		b, _ := io.ReadAll(resp.Body)
		return resp.StatusCode, string(b)
	}
	if code, _ := get("/healthz", ""); code != 200 {
		t.Errorf("/healthz over HTTPS: %d", code)
	}
	if code, b := get("/v1/models", ""); code != 401 {
		t.Errorf("/v1/models without a token: %d %s", code, b)
	}
	if code, b := get("/v1/models", alpha); code != 200 || !strings.Contains(b, `"tarnwick-platform"`) {
		t.Errorf("/v1/models as alpha: %d %s (the examples are preloaded for each tenant)", code, b)
	}

	cli := func(args ...string) (int, string, string) {
		return runCLI(t, append(args, "--server", grpcAddr, "--ca", caFile)...)
	}
	if code, _, errs := cli("models"); code != 1 || !strings.Contains(errs, "Unauthenticated") || !strings.Contains(errs, "--token") {
		t.Errorf("models without a token: exit %d, %s", code, errs)
	}
	code, out, errs := cli("submit", "--token", alpha, "--model", "tarnwick-platform", "--evidence", "alarm_checkout_5xx=firing",
		"--target", "bad_deploy", "--method", "exact", "--watch")
	if code != 0 || !strings.Contains(out, "succeeded") || !strings.Contains(out, "bad_deploy") {
		t.Errorf("submit --watch as alpha: exit %d\n%s\n%s", code, out, errs)
	}
	if code, _, errs := cli("submit", "--token", alpha, "--model", "tarnwick-platform", "--samples", "100001"); code != 1 ||
		!strings.Contains(errs, "max_samples_per_job") || !strings.Contains(errs, "ResourceExhausted") {
		t.Errorf("submit over the quota: exit %d, %s", code, errs)
	}
	if code, _, errs := cli("tenants", "--token", alpha); code != 1 || !strings.Contains(errs, "PermissionDenied") {
		t.Errorf("tenants as a member: exit %d, %s", code, errs)
	}
	code, out, errs = cli("tenants", "--token", admin)
	if code != 0 || !regexp.MustCompile(`(?m)^alpha\s+0\s+0\s+-\s+100,000\s+-\s+1$`).MatchString(out) {
		t.Errorf("tenants as the admin: exit %d\n%s\n%s", code, out, errs)
	}
	// Without the CA the client cannot connect; a token is not sent in the
	// clear beyond loopback.
	if code, _, errs := runCLI(t, "models", "--server", grpcAddr, "--token", alpha); code != 1 || !strings.Contains(errs, "--ca or --tls") {
		t.Errorf("models without --ca: exit %d, %s", code, errs)
	}
	if code, _, errs := runCLI(t, "models", "--server", "10.0.0.1:9090", "--token", alpha); code != 2 || !strings.Contains(errs, "unencrypted") {
		t.Errorf("a token to a remote plain-text server: exit %d, %s", code, errs)
	}
	if strings.Contains(p.output(), alpha) || strings.Contains(p.output(), admin) {
		t.Error("the server's output holds a token")
	}
}

// Without tokens, serve says at start that it is open.
func TestServeSaysItIsOpen(t *testing.T) {
	if testing.Short() {
		t.Skip("starts processes")
	}
	p := startProc(t, "serve", "--http-addr", "127.0.0.1:0", "--grpc-addr", "127.0.0.1:0", "--workers", "0", "--preload=false")
	p.waitFor(t, regexp.MustCompile(`no tokens configured: the API is open on loopback`), 30*time.Second)
}

// With --tenants-redis-key the tenants document lives in Redis and is read
// again every --tenants-reload: a token added there is accepted, and one
// removed is refused, without a restart. With --metrics-need-token,
// /metrics answers the metrics role only.
func TestServeTenantsFromRedis(t *testing.T) {
	if testing.Short() {
		t.Skip("starts processes")
	}
	rs := redistest.StartServer(t, redistest.Options{})
	rdb := redis.NewClient(&redis.Options{Addr: rs.Addr()})
	t.Cleanup(func() { _ = rdb.Close() })
	ctx := context.Background()
	first, _ := auth.NewToken()
	second, _ := auth.NewToken()
	scrape, _ := auth.NewToken()
	put := func(tokens ...string) {
		t.Helper()
		d := auth.Document{Tenants: map[string]jobs.TenantPolicy{"alpha": {}, "ops": {}},
			Tokens: []auth.TokenEntry{{Label: "prometheus", Tenant: "ops", Role: auth.RoleMetrics, SHA256: auth.HashToken(scrape)}}}
		for i, tok := range tokens {
			d.Tokens = append(d.Tokens, auth.TokenEntry{Label: fmt.Sprint("t", i), Tenant: "alpha", Role: auth.RoleMember, SHA256: auth.HashToken(tok)})
		}
		b, _ := json.Marshal(d)
		if err := rdb.Set(ctx, "beliefd:tenants", b, 0).Err(); err != nil {
			t.Fatal(err)
		}
	}
	put(first)
	p := startProc(t, "serve", "--redis", rs.URL(), "--tenants-redis-key", "beliefd:tenants", "--tenants-reload", "1s",
		"--metrics-need-token", "--workers", "0", "--http-addr", "127.0.0.1:0", "--grpc-addr", "127.0.0.1:0")
	base := p.waitFor(t, regexp.MustCompile(`serving on (http://[0-9.:]+) `), 30*time.Second)[1]
	statusOf := func(path, token string) int {
		req, _ := http.NewRequest("GET", base+path, nil)
		req.Header.Set("Authorization", "Bearer "+token)
		resp, err := http.DefaultClient.Do(req)
		if err != nil {
			t.Fatal(err)
		}
		resp.Body.Close()
		return resp.StatusCode
	}
	status := func(token string) int { return statusOf("/v1/models", token) }
	// --metrics-need-token: /metrics for the metrics role, not for members.
	if a, b, c := statusOf("/metrics", ""), statusOf("/metrics", first), statusOf("/metrics", scrape); a != 401 || b != 403 || c != 200 {
		t.Errorf("/metrics without a token, as a member, as the metrics role: %d, %d, %d; want 401, 403, 200", a, b, c)
	}
	if c := status(scrape); c != 403 {
		t.Errorf("/v1/models with the metrics token: %d; want 403", c)
	}
	if a, b := status(first), status(second); a != 200 || b != 401 {
		t.Fatalf("before the change: first token %d, second %d; want 200, 401", a, b)
	}
	put(second) // the first token is revoked, the second added
	deadline := time.Now().Add(10 * time.Second)
	for status(first) != 401 || status(second) != 200 {
		if time.Now().After(deadline) {
			t.Fatalf("10s after the change: first token %d, second %d; want 401, 200", status(first), status(second))
		}
		time.Sleep(100 * time.Millisecond)
	}
	if strings.Contains(p.output(), first) || strings.Contains(p.output(), second) {
		t.Error("the server's output holds a token")
	}
}
