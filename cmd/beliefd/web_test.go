package main

import (
	"context"
	"encoding/json"
	"fmt"
	"math"
	"net/http"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/beliefd/beliefd/service/examples"
	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/model"
	"github.com/chromedp/cdproto/network"
	"github.com/chromedp/cdproto/runtime"
	"github.com/chromedp/chromedp"
)

// webTestToken is typed into the page's token field to check that every
// API request, the event stream included, carries it. It is no secret: the
// server of this test checks no tokens.
const webTestToken = "page-test-token"

// webBudget bounds the whole browser session; the browser is stopped when
// it runs out.
const webBudget = 4 * time.Minute

// chromiumPath finds Debian's chromium. Without it the test is skipped,
// except under CI=true, where it fails.
func chromiumPath(t *testing.T) string {
	t.Helper()
	for _, name := range []string{"chromium", "chromium-browser"} {
		if p, err := exec.LookPath(name); err == nil {
			return p
		}
	}
	msg := "no chromium on PATH: the web page test needs headless Chromium (apt-get install chromium)"
	if os.Getenv("CI") == "true" {
		t.Fatal(msg + "; under CI=true it must run")
	}
	t.Skip(msg)
	return ""
}

// artefactDir is where the screenshots go: $BELIEFD_ARTIFACTS, or a new
// temporary directory that is kept.
func artefactDir(t *testing.T) string {
	t.Helper()
	dir := os.Getenv("BELIEFD_ARTIFACTS")
	var err error
	if dir == "" {
		dir, err = os.MkdirTemp("", "beliefd-web-artefacts")
	} else {
		err = os.MkdirAll(dir, 0o755)
	}
	if err != nil {
		t.Fatal(err)
	}
	t.Logf("screenshots of the web page in %s", dir)
	return dir
}

// pageLog collects what the browser reports: script exceptions,
// console.error calls, and the API requests with their Authorization
// header and status.
type pageLog struct {
	mu         sync.Mutex
	exceptions []string
	requests   map[network.RequestID]*pageRequest
	order      []network.RequestID
}

type pageRequest struct {
	method, url, auth string
	status            int64
}

func (l *pageLog) handle(ev any) {
	l.mu.Lock()
	defer l.mu.Unlock()
	switch ev := ev.(type) {
	case *runtime.EventExceptionThrown:
		d := ev.ExceptionDetails
		text := d.Text
		if d.Exception != nil && d.Exception.Description != "" {
			text += " " + d.Exception.Description
		}
		l.exceptions = append(l.exceptions, fmt.Sprintf("%s:%d: %s", d.URL, d.LineNumber+1, text))
	case *runtime.EventConsoleAPICalled:
		if ev.Type == runtime.ConsoleAPICalledTypeError {
			var parts []string
			for _, a := range ev.Args {
				parts = append(parts, string(a.Value)+a.Description)
			}
			l.exceptions = append(l.exceptions, "console.error: "+strings.Join(parts, " "))
		}
	case *network.EventRequestWillBeSent:
		if !strings.Contains(ev.Request.URL, "/v1/") {
			return
		}
		var auth string
		for k, v := range ev.Request.Headers { // fetch() sends header names in lower case
			if strings.EqualFold(k, "Authorization") {
				auth, _ = v.(string)
			}
		}
		if _, ok := l.requests[ev.RequestID]; !ok {
			l.order = append(l.order, ev.RequestID)
		}
		l.requests[ev.RequestID] = &pageRequest{method: ev.Request.Method, url: ev.Request.URL, auth: auth}
	case *network.EventResponseReceived:
		if r, ok := l.requests[ev.RequestID]; ok {
			r.status = ev.Response.Status
		}
	}
}

// find returns the requests whose URL ends with suffix, oldest first.
func (l *pageLog) find(suffix string) []pageRequest {
	l.mu.Lock()
	defer l.mu.Unlock()
	var out []pageRequest
	for _, id := range l.order {
		if r := l.requests[id]; strings.HasSuffix(r.url, suffix) {
			out = append(out, *r)
		}
	}
	return out
}

func (l *pageLog) errors() []string {
	l.mu.Lock()
	defer l.mu.Unlock()
	return append([]string(nil), l.exceptions...)
}

// marginals are a result document's posteriors.
type marginals map[string]map[string]struct {
	P  float64 `json:"p"`
	Lo float64 `json:"lo"`
	Hi float64 `json:"hi"`
}

// webJob is the part of a job view the test compares with the page.
type webJob struct {
	ID               string    `json:"id"`
	State            string    `json:"state"`
	Method           string    `json:"method"`
	Samples          int64     `json:"samples"`
	EffectiveSamples float64   `json:"effective_samples"`
	StopReason       string    `json:"stop_reason"`
	Caution          string    `json:"caution"`
	Marginals        marginals `json:"marginals"`
}

func getWebJob(t *testing.T, base, id string) webJob {
	t.Helper()
	resp, err := http.Get(base + "/v1/jobs/" + id)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	var j webJob
	if resp.StatusCode != 200 {
		t.Fatalf("GET /v1/jobs/%s: %d", id, resp.StatusCode)
	}
	if err := json.NewDecoder(resp.Body).Decode(&j); err != nil {
		t.Fatal(err)
	}
	return j
}

// Drawing facts the page exposes in its SVG.
type drawnNode struct {
	Name  string  `json:"name"`
	Layer int     `json:"layer"`
	X     float64 `json:"x"`
	Y     float64 `json:"y"`
	W     float64 `json:"w"`
}

type drawnEdge struct {
	From string `json:"from"`
	To   string `json:"to"`
}

type drawing struct {
	Nodes []drawnNode `json:"nodes"`
	Edges []drawnEdge `json:"edges"`
}

const drawingJS = `(() => {
  const svg = document.querySelector('svg.net-drawing');
  const nodes = [...svg.querySelectorAll('g.node')].map(g => {
    const m = /translate\(([-0-9.]+),([-0-9.]+)\)/.exec(g.getAttribute('transform'));
    return {name: g.dataset.var, layer: +g.dataset.layer, x: +m[1], y: +m[2], w: +g.querySelector('rect.box').getAttribute('width')};
  });
  const edges = [...svg.querySelectorAll('path.edge')].map(p => ({from: p.dataset.from, to: p.dataset.to}));
  return {nodes, edges};
})()`

// A posterior row as drawn.
type barRow struct {
	Var    string  `json:"var"`
	State  string  `json:"state"`
	P      string  `json:"p"`
	Lo     string  `json:"lo"`
	Hi     string  `json:"hi"`
	BarW   float64 `json:"barW"`
	TrackX float64 `json:"trackX"`
	TrackW float64 `json:"trackW"`
	WLo    float64 `json:"wlo"`
	WHi    float64 `json:"whi"`
	Picked bool    `json:"picked"`
}

const barsJS = `[...document.querySelectorAll(%q)].map(g => {
  const track = g.querySelector('rect.track'), bar = g.querySelector('rect.bar');
  const w = g.querySelector('line.whisker');
  return {var: g.dataset.var, state: g.dataset.state, p: g.dataset.p, lo: g.dataset.lo, hi: g.dataset.hi,
    barW: +bar.getAttribute('width'), trackX: +track.getAttribute('x'), trackW: +track.getAttribute('width'),
    wlo: w ? +w.getAttribute('x1') : NaN, whi: w ? +w.getAttribute('x2') : NaN, picked: g.classList.contains('is-picked')};
})`

type convPlot struct {
	Points      int       `json:"points"`
	Xs          []float64 `json:"xs"`
	Band        string    `json:"band"`
	Estimate    string    `json:"estimate"`
	LastSamples string    `json:"lastSamples"`
	LastP       string    `json:"lastP"`
}

const convJS = `(() => {
  const s = document.querySelector('svg.convergence');
  if (!s) return null;
  return {points: +s.dataset.points, xs: [...s.querySelectorAll('circle.point')].map(c => +c.getAttribute('cx')),
    band: (s.querySelector('path.band') || {getAttribute: () => ''}).getAttribute('d') || '',
    estimate: (s.querySelector('path.estimate') || {getAttribute: () => ''}).getAttribute('d') || '',
    lastSamples: s.dataset.lastSamples || '', lastP: s.dataset.lastP || ''};
})()`

// TestWebPage drives the page at / in headless Chromium against `beliefd
// serve` on loopback with its embedded example: the example model is
// listed and drawn as a layered network of its variables and parent links,
// a job submitted through the page's form runs to the end while the page
// follows its event stream, and the posterior bars, whiskers, facts and
// convergence plot show the numbers of the job's result document. The
// token typed into the page goes with every API request, the event stream
// included. Screenshots go to $BELIEFD_ARTIFACTS (default: a temporary
// directory, logged), and the README's to $BELIEFD_SCREENSHOTS when set.
func TestWebPage(t *testing.T) {
	if testing.Short() {
		t.Skip("starts a server and a browser")
	}
	browser := chromiumPath(t)
	artefacts := artefactDir(t)
	readme := os.Getenv("BELIEFD_SCREENSHOTS")
	if readme != "" {
		if err := os.MkdirAll(readme, 0o755); err != nil {
			t.Fatal(err)
		}
	}
	doc, _, err := examples.Load("tarnwick-platform")
	if err != nil {
		t.Fatal(err)
	}

	// Two workers: a job as long here as on a machine with many cores, so
	// that the page sees several partial results.
	srv := startProc(t, "serve", "--http-addr", "127.0.0.1:0", "--grpc-addr", "127.0.0.1:0", "--workers", "2", "--log-level", "warn")
	base := srv.waitFor(t, regexp.MustCompile(`serving on (http://[0-9.:]+) `), 60*time.Second)[1]

	profile, err := os.MkdirTemp("", "beliefd-chromium-profile")
	if err != nil {
		t.Fatal(err)
	}
	defer os.RemoveAll(profile)
	budget, cancelBudget := context.WithTimeout(context.Background(), webBudget)
	defer cancelBudget()
	allocCtx, cancelAlloc := chromedp.NewExecAllocator(budget,
		chromedp.ExecPath(browser),
		chromedp.Flag("headless", true),
		chromedp.NoSandbox,
		chromedp.DisableGPU,
		chromedp.Flag("disable-quic", true),
		chromedp.NoFirstRun,
		chromedp.Flag("disable-background-networking", true),
		chromedp.Flag("disable-component-update", true),
		chromedp.Flag("disable-sync", true),
		chromedp.Flag("hide-scrollbars", true),
		chromedp.UserDataDir(profile),
		chromedp.WindowSize(1280, 960),
	)
	defer cancelAlloc() // stops the browser and waits for it, before the profile is removed
	ctx, cancel := chromedp.NewContext(allocCtx)
	defer cancel()
	if err := chromedp.Do(ctx, chromedp.EmulateViewport(1280, 960)); err != nil {
		t.Fatalf("starting %s: %v", browser, err)
	}
	log := &pageLog{requests: map[network.RequestID]*pageRequest{}}
	if err := chromedp.Listen(ctx, log.handle); err != nil {
		t.Fatal(err)
	}

	shot := func(name string, forReadme bool) {
		t.Helper()
		png, err := chromedp.Run(ctx, chromedp.CaptureScreenshot())
		if err != nil {
			t.Errorf("screenshot %s: %v", name, err)
			return
		}
		if err := os.WriteFile(filepath.Join(artefacts, name), png, 0o644); err != nil {
			t.Error(err)
		}
		if forReadme && readme != "" {
			if err := os.WriteFile(filepath.Join(readme, strings.TrimLeft(name, "0123456789-")), png, 0o644); err != nil {
				t.Error(err)
			}
		}
	}
	shotOf := func(name, sel string, forReadme bool) {
		t.Helper()
		png, err := chromedp.Run(ctx, chromedp.Screenshot(chromedp.CSS(sel)))
		if err != nil {
			t.Errorf("screenshot %s of %s: %v", name, sel, err)
			return
		}
		if err := os.WriteFile(filepath.Join(artefacts, name), png, 0o644); err != nil {
			t.Error(err)
		}
		if forReadme && readme != "" {
			if err := os.WriteFile(filepath.Join(readme, strings.TrimLeft(name, "0123456789-")), png, 0o644); err != nil {
				t.Error(err)
			}
		}
	}
	do := func(what string, steps ...chromedp.Action[chromedp.Void]) {
		t.Helper()
		if err := chromedp.Do(ctx, steps...); err != nil {
			shot("failed.png", false)
			t.Fatalf("%s: %v\npage errors: %v", what, err, log.errors())
		}
	}
	eval := func(what, js string, into any) {
		t.Helper()
		raw, err := chromedp.Run(ctx, chromedp.Evaluate[[]byte](js))
		if err == nil {
			err = json.Unmarshal(raw, into)
		}
		if err != nil {
			shot("failed.png", false)
			t.Fatalf("%s: %v", what, err)
		}
	}
	waitJS := func(what, predicate string, within time.Duration) {
		t.Helper()
		do(what, chromedp.Poll[chromedp.Void](predicate, chromedp.WithPollingInterval(50*time.Millisecond), chromedp.WithPollingTimeout(within)))
	}

	// A standing query, when the server has them.
	standing := createStanding(t, base)

	// The page loads with no token and lists the example model.
	do("open the page",
		chromedp.Navigate(base+"/"),
		chromedp.WaitVisible(chromedp.CSS(`#model-list a[data-model="tarnwick-platform"]`)))
	if standing == nil {
		waitJS("the empty standing queries panel", `(document.querySelector('#standing .empty') || {}).textContent === 'no standing queries'`, 20*time.Second)
	} else {
		waitJS("the standing query's posteriors", `document.querySelectorAll('#standing .card[data-standing="checkout-watch"] g.post-row').length > 0`, 20*time.Second)
		checkBars(t, ctx, `#standing .card[data-standing="checkout-watch"]`, standing, 2+3)
	}
	shot("1-home.png", false)

	// The model's drawing: one node per variable, one edge per parent link,
	// every edge pointing to a lower layer, no two nodes of a layer overlapping.
	do("open the model", chromedp.Click(chromedp.CSS(`#model-list a[data-model="tarnwick-platform"]`)))
	waitJS("the network drawing", fmt.Sprintf(`document.querySelectorAll('svg.net-drawing g.node').length === %d`, len(doc.Variables)), 20*time.Second)
	var d drawing
	eval("read the drawing", drawingJS, &d)
	checkDrawing(t, doc.Variables, d)

	// Evidence and targets through the variable panel and the form.
	for _, alarm := range []string{"alarm_checkout_5xx", "alarm_synthetic_checkout"} {
		do("evidence "+alarm,
			chromedp.Click(chromedp.CSS(fmt.Sprintf(`svg.net-drawing g.node[data-var=%q]`, alarm))),
			chromedp.WaitVisible(chromedp.CSS(fmt.Sprintf(`#details h3[data-detail=%q]`, alarm))),
			chromedp.Click(chromedp.CSS(`#details button[data-evidence-state="firing"]`)))
	}
	do("target bad_deploy from its panel",
		chromedp.Click(chromedp.CSS(`svg.net-drawing g.node[data-var="bad_deploy"]`)),
		chromedp.WaitVisible(chromedp.CSS(`#details h3[data-detail="bad_deploy"]`)),
		chromedp.Click(chromedp.CSS(`#details button[data-target-toggle="bad_deploy"]`)))
	do("targets from the form",
		chromedp.Click(chromedp.CSS(`input[name=target][value="orders_db"]`)),
		chromedp.Click(chromedp.CSS(`input[name=target][value="checkout_api"]`)),
		chromedp.SetValue(chromedp.CSS(`select[name=method]`), "likelihood-weighting"),
		chromedp.SetValue(chromedp.CSS(`input[name=abs_err]`), "0.002"),
		chromedp.SetValue(chromedp.CSS(`input[name=confidence]`), "0.95"),
		chromedp.SetValue(chromedp.CSS(`input[name=timeout]`), "120s"),
		chromedp.SetValue(chromedp.CSS(`input[name=seed]`), "7"))
	waitJS("evidence and targets on the drawing",
		`document.querySelectorAll('g.node.is-evidence').length === 2 && document.querySelectorAll('g.node.is-target').length === 3 && document.querySelectorAll('#query-form .ev-row').length === 2`,
		5*time.Second)
	do("show the drawing", chromedp.Evaluate[chromedp.Void](`window.scrollTo(0, 0)`))
	shot("2-model.png", true)
	// The variable panel with a distribution that has parents, beside the form.
	do("show checkout_api",
		chromedp.Click(chromedp.CSS(`svg.net-drawing g.node[data-var="checkout_api"]`)),
		chromedp.WaitVisible(chromedp.CSS(`#details h3[data-detail="checkout_api"]`)))
	shotOf("3-question.png", `main > .two`, true)

	// Submit: the page opens the job and follows it to the end.
	do("submit the query", chromedp.Click(chromedp.CSS(`#submit-query`)))
	waitJS("the job view", `location.hash.startsWith('#/jobs/') && document.querySelector('#job-state') !== null`, 20*time.Second)
	var hash string
	eval("read the job id", `location.hash`, &hash)
	id := strings.TrimPrefix(hash, "#/jobs/")
	waitJS("a few partial results, or the end",
		`(() => { const s = document.querySelector('#job-state').dataset.state, c = document.querySelector('svg.convergence');
		  return !['queued', 'running'].includes(s) || (c && +c.dataset.points >= 3); })()`, 120*time.Second)
	var running string
	eval("read the state", `document.querySelector('#job-state').dataset.state`, &running)
	if running == "running" {
		shot("4-job-running.png", false)
	}
	waitJS("the end of the job", `!['queued', 'running'].includes(document.querySelector('#job-state').dataset.state)`, 150*time.Second)
	do("show the result", chromedp.Evaluate[chromedp.Void](`window.scrollTo(0, 0)`))
	shot("5-job.png", true)

	j := getWebJob(t, base, id)
	if j.State != "succeeded" || j.Method != "likelihood-weighting" || j.StopReason != "abs_err" {
		t.Fatalf("job %s: state %s, method %s, stop reason %q", id, j.State, j.Method, j.StopReason)
	}
	if evs := log.find("/v1/jobs/" + id + "/events"); len(evs) == 0 {
		t.Errorf("the page did not read the job's event stream")
	}
	if picked := checkBars(t, ctx, "#job-posteriors", j.Marginals, 2+3+3); picked != 1 {
		t.Errorf("%d rows marked as followed by the convergence plot, want 1", picked)
	}
	checkFacts(t, ctx, j)

	var conv convPlot
	eval("read the convergence plot", convJS, &conv)
	checkConvergence(t, conv, j)

	// The token goes with every API request, the event stream included.
	do("keep a token",
		chromedp.SetValue(chromedp.CSS(`#token-input`), webTestToken),
		chromedp.Click(chromedp.CSS(`#token-form button[type=submit]`)))
	var stored *string
	eval("read the kept token", `sessionStorage.getItem('beliefd.token')`, &stored)
	if stored == nil || *stored != webTestToken {
		t.Fatalf("the token field kept %v in session storage", stored)
	}
	id2 := submitLongJob(t, base)
	do("open a running job", chromedp.Evaluate[chromedp.Void](`location.hash = '#/jobs/`+id2+`'`))
	waitJS("the running job", `document.querySelector('#job-state') !== null && location.hash.endsWith('`+id2+`')`, 20*time.Second)
	deadline := time.Now().Add(20 * time.Second)
	var gets, streams []pageRequest
	for time.Now().Before(deadline) {
		gets, streams = log.find("/v1/jobs/"+id2), log.find("/v1/jobs/"+id2+"/events")
		if len(gets) > 0 && gets[0].status != 0 && (gets[0].status != 200 || len(streams) > 0) {
			break
		}
		time.Sleep(50 * time.Millisecond)
	}
	if len(gets) == 0 {
		t.Fatalf("the page did not ask for job %s", id2)
	}
	for _, r := range append(gets, streams...) {
		if r.auth != "Bearer "+webTestToken {
			t.Errorf("%s %s: Authorization %q, want the token from the field", r.method, r.url, r.auth)
		}
	}
	if gets[0].status == 200 && len(streams) == 0 {
		t.Errorf("the page did not follow the running job's event stream")
	}
	// A cancellation made elsewhere reaches the page through the stream.
	resp, err := http.Post(base+"/v1/jobs/"+id2+"/cancel", "application/json", nil)
	if err != nil {
		t.Fatal(err)
	}
	resp.Body.Close()
	waitJS("the cancellation on the page", `document.querySelector('#job-state').dataset.state === 'cancelled'`, 30*time.Second)
	do("forget the token", chromedp.Click(chromedp.CSS(`#token-clear`)))
	var kept *string
	eval("read the session storage", `sessionStorage.getItem('beliefd.token')`, &kept)
	if kept != nil {
		t.Errorf("the token is still kept after forget: %q", *kept)
	}

	if errs := log.errors(); len(errs) > 0 {
		t.Errorf("the page reported errors:\n%s", strings.Join(errs, "\n"))
	}
}

// checkDrawing compares the drawing with the model document.
func checkDrawing(t *testing.T, vars []model.Variable, d drawing) {
	t.Helper()
	byName := map[string]drawnNode{}
	for _, n := range d.Nodes {
		if _, dup := byName[n.Name]; dup {
			t.Errorf("variable %s drawn twice", n.Name)
		}
		byName[n.Name] = n
	}
	want := map[drawnEdge]bool{}
	for _, v := range vars {
		if _, ok := byName[v.Name]; !ok {
			t.Errorf("variable %s is not drawn", v.Name)
		}
		for _, p := range v.Parents {
			want[drawnEdge{p, v.Name}] = true
		}
	}
	if len(d.Nodes) != len(vars) {
		t.Errorf("%d nodes drawn for %d variables", len(d.Nodes), len(vars))
	}
	seen := map[drawnEdge]bool{}
	for _, e := range d.Edges {
		if !want[e] || seen[e] {
			t.Errorf("edge %s -> %s is not a parent link of the model, or drawn twice", e.From, e.To)
		}
		seen[e] = true
		if a, b := byName[e.From], byName[e.To]; a.Layer >= b.Layer || a.Y >= b.Y {
			t.Errorf("edge %s -> %s does not point down: layers %d -> %d, y %.0f -> %.0f", e.From, e.To, a.Layer, b.Layer, a.Y, b.Y)
		}
	}
	if len(seen) != len(want) {
		t.Errorf("%d edges drawn for %d parent links", len(seen), len(want))
	}
	for _, a := range d.Nodes {
		for _, b := range d.Nodes {
			if a.Name < b.Name && a.Layer == b.Layer && a.X < b.X+b.W && b.X < a.X+a.W {
				t.Errorf("nodes %s and %s overlap in layer %d", a.Name, b.Name, a.Layer)
			}
		}
	}
}

// checkBars compares each row drawn under root with the result's
// marginals: the same targets and states, the same numbers, a bar as long
// as the estimate and a whisker from lo to hi on the 0..1 track. Sizes are
// written with two decimals, hence the 0.005 px rounding allowance. It
// returns how many rows are marked as followed by the convergence plot.
func checkBars(t *testing.T, ctx context.Context, root string, m marginals, wantRows int) (picked int) {
	t.Helper()
	raw, err := chromedp.Run(ctx, chromedp.Evaluate[[]byte](fmt.Sprintf(barsJS, root+" svg.posterior g.post-row")))
	if err != nil {
		t.Fatal(err)
	}
	var rows []barRow
	if err := json.Unmarshal(raw, &rows); err != nil {
		t.Fatal(err)
	}
	want := 0
	for _, states := range m {
		want += len(states)
	}
	if len(rows) != want || want != wantRows {
		t.Errorf("%s: %d posterior rows drawn; the result has %d target states, the query asked for %d", root, len(rows), want, wantRows)
	}
	const px = 0.005 + 1e-9
	for _, r := range rows {
		iv, ok := m[r.Var][r.State]
		if !ok {
			t.Errorf("%s: row %s = %s is not in the result", root, r.Var, r.State)
			continue
		}
		p, _ := strconv.ParseFloat(r.P, 64)
		lo, _ := strconv.ParseFloat(r.Lo, 64)
		hi, _ := strconv.ParseFloat(r.Hi, 64)
		if p != iv.P || lo != iv.Lo || hi != iv.Hi {
			t.Errorf("%s = %s: page shows %s [%s, %s], result has %v [%v, %v]", r.Var, r.State, r.P, r.Lo, r.Hi, iv.P, iv.Lo, iv.Hi)
		}
		if !(iv.Lo <= iv.P && iv.P <= iv.Hi && iv.Lo < iv.Hi) {
			t.Errorf("%s = %s: a sampled estimate needs lo <= p <= hi with some width: %v [%v, %v]", r.Var, r.State, iv.P, iv.Lo, iv.Hi)
		}
		if math.Abs(r.BarW-iv.P*r.TrackW) > px {
			t.Errorf("%s = %s: bar %.2f px for p = %v on a %.0f px track", r.Var, r.State, r.BarW, iv.P, r.TrackW)
		}
		if math.Abs(r.WLo-(r.TrackX+iv.Lo*r.TrackW)) > px || math.Abs(r.WHi-(r.TrackX+iv.Hi*r.TrackW)) > px {
			t.Errorf("%s = %s: whisker %.2f..%.2f px for [%v, %v]", r.Var, r.State, r.WLo, r.WHi, iv.Lo, iv.Hi)
		}
		if r.Picked {
			picked++
		}
	}
	return picked
}

// checkFacts reads the samples, effective samples, stop reason and caution
// shown beside the bars.
func checkFacts(t *testing.T, ctx context.Context, j webJob) {
	t.Helper()
	var facts map[string]string
	raw, err := chromedp.Run(ctx, chromedp.Evaluate[[]byte](`Object.fromEntries([...document.querySelectorAll('#job-facts dd[data-fact]')].map(d => [d.dataset.fact, d.textContent]))`))
	if err == nil {
		err = json.Unmarshal(raw, &facts)
	}
	if err != nil {
		t.Fatal(err)
	}
	digits := func(s string) string { return regexp.MustCompile(`\D`).ReplaceAllString(s, "") }
	if got := digits(facts["samples"]); got != strconv.FormatInt(j.Samples, 10) {
		t.Errorf("samples shown %q, result has %d", facts["samples"], j.Samples)
	}
	ess := strings.SplitN(facts["effective samples (ESS)"], " (", 2)[0]
	if got := digits(ess); got != strconv.FormatInt(int64(math.Round(j.EffectiveSamples)), 10) {
		t.Errorf("ESS shown %q, result has %v", facts["effective samples (ESS)"], j.EffectiveSamples)
	}
	if !strings.HasPrefix(facts["stop reason"], j.StopReason+":") {
		t.Errorf("stop reason shown %q, result has %q", facts["stop reason"], j.StopReason)
	}
	caution, err := chromedp.Run(ctx, chromedp.Evaluate[string](`document.querySelector('#job-facts .caution').textContent`))
	if err != nil {
		t.Fatal(err)
	}
	if caution != j.Caution || caution != infer.Caution {
		t.Errorf("caution shown %q, result has %q", caution, j.Caution)
	}
}

// checkConvergence: the plot has several points in the order of the
// samples drawn, a band and a line, and ends at the final result.
func checkConvergence(t *testing.T, c convPlot, j webJob) {
	t.Helper()
	if c.Points < 2 || len(c.Xs) != c.Points {
		t.Fatalf("convergence plot with %d points (%d drawn): the page should have seen several partial results", c.Points, len(c.Xs))
	}
	for i := 1; i < len(c.Xs); i++ {
		if c.Xs[i] <= c.Xs[i-1] {
			t.Errorf("convergence points out of order at %d: %v", i, c.Xs)
		}
	}
	if !strings.HasPrefix(c.Band, "M") || !strings.HasSuffix(c.Band, "Z") || !strings.HasPrefix(c.Estimate, "M") {
		t.Errorf("convergence band %q, estimate %q", c.Band, c.Estimate)
	}
	if c.LastSamples != strconv.FormatInt(j.Samples, 10) {
		t.Errorf("the plot ends at %s samples, the result has %d", c.LastSamples, j.Samples)
	}
	p, _ := strconv.ParseFloat(c.LastP, 64)
	if p != j.Marginals["bad_deploy"]["yes"].P {
		t.Errorf("the plot ends at p = %s, the result has P(bad_deploy = yes) = %v", c.LastP, j.Marginals["bad_deploy"]["yes"].P)
	}
}

// createStanding registers a standing query and waits for its first
// result, which it returns; nil when the server has no standing queries
// (404).
func createStanding(t *testing.T, base string) marginals {
	t.Helper()
	body := `{"id": "checkout-watch", "model": "tarnwick-platform", "targets": ["bad_deploy", "orders_db"],
	  "evidence": {"alarm_checkout_5xx": "firing"}, "method": "likelihood-weighting",
	  "stop": {"max_samples": 400000}, "seed": 3, "interval": "10m"}`
	resp, err := http.Post(base+"/v1/standing-queries?wait=60s", "application/json", strings.NewReader(body))
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	if resp.StatusCode == http.StatusNotFound {
		t.Log("the server has no /v1/standing-queries: the panel must say so")
		return nil
	}
	var v struct {
		Status string `json:"status"`
		Result *struct {
			Marginals marginals `json:"marginals"`
		} `json:"result"`
	}
	if resp.StatusCode != http.StatusCreated && resp.StatusCode != http.StatusOK {
		t.Fatalf("POST /v1/standing-queries: %d", resp.StatusCode)
	}
	if err := json.NewDecoder(resp.Body).Decode(&v); err != nil {
		t.Fatal(err)
	}
	if v.Result == nil {
		t.Fatalf("standing query without a result after waiting (status %s)", v.Status)
	}
	return v.Result.Marginals
}

// submitLongJob starts a job that runs until cancelled (or 60 s).
func submitLongJob(t *testing.T, base string) string {
	t.Helper()
	body := `{"model": "tarnwick-platform", "evidence": {"alarm_canary": "firing"}, "targets": ["bad_deploy"],
	  "method": "likelihood-weighting", "stop": {"timeout": "60s"}, "seed": 11}`
	resp, err := http.Post(base+"/v1/jobs", "application/json", strings.NewReader(body))
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	var v struct {
		ID string `json:"id"`
	}
	if resp.StatusCode != http.StatusAccepted {
		t.Fatalf("POST /v1/jobs: %d", resp.StatusCode)
	}
	if err := json.NewDecoder(resp.Body).Decode(&v); err != nil {
		t.Fatal(err)
	}
	return v.ID
}
