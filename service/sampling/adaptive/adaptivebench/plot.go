package adaptivebench

import (
	"context"
	"fmt"
	"io"
	"math"
	"math/rand/v2"
	"strings"

	"github.com/beliefd/beliefd/service/internal/testnets"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
	"github.com/beliefd/beliefd/service/sampling/adaptive"
)

// series is one line of the plot: x = samples, y = relative error.
type series struct {
	name   string
	color  string
	dashed bool
	x, y   []float64
}

// plot measures the relative error |p̂ - p|/p of P(top event) against the
// samples drawn (learning included) for both methods on the first rare
// top-event case, median over a few seeds, and writes the SVG.
func plot(ctx context.Context, cfg Config) error {
	c := topCases[0]
	ft := testnets.FaultTree(rand.New(rand.NewPCG(c.seed, 11)), c.opt)
	net, err := model.Compile(ft.Doc, model.Limits{})
	if err != nil {
		return err
	}
	eng, err := compileExact(net)
	if err != nil {
		return err
	}
	top, _ := net.Index(ft.Top)
	post, err := eng.Posterior(nil, []int{top})
	if err != nil {
		return err
	}
	p := post.Marginals[0][1]
	grid := []int64{1e4, 3e4, 1e5, 3e5, 1e6}
	if cfg.Quick {
		grid = grid[:4]
	}
	seeds := 3
	lw := series{name: "likelihood weighting", color: "#c0392b"}
	lwTheory := series{name: "likelihood weighting, expected (√((1-p)/(pN)))", color: "#c0392b", dashed: true}
	var ad []series
	colors := []string{"#2471a3", "#1e8449"}
	for i, v := range Variants {
		ad = append(ad, series{name: "adaptive: " + v.Name, color: colors[i%len(colors)]})
	}
	for _, n := range grid {
		var errs []float64
		for s := 0; s < seeds; s++ {
			est, err := sampling.Run(ctx, net, nil, []int{top}, sampling.Options{Method: sampling.MethodLikelihoodWeighting, Seed: uint64(s + 1),
				Stop: sampling.Stop{MaxSamples: n}, Workers: cfg.Workers})
			if err != nil {
				return err
			}
			errs = append(errs, math.Abs(est.Marginals[0][1].P-p)/p)
		}
		lw.x, lw.y = append(lw.x, float64(n)), append(lw.y, median(errs))
		lwTheory.x, lwTheory.y = append(lwTheory.x, float64(n)), append(lwTheory.y, math.Sqrt((1-p)/(p*float64(n))))
		for i, v := range Variants {
			var errs, xs []float64
			for s := 0; s < seeds; s++ {
				o := v.Opt
				o.Seed, o.Workers, o.RareTargets, o.RareThreshold = uint64(s+1), cfg.Workers, []int{top}, -1
				o.Stop = sampling.Stop{MaxSamples: n}
				res, err := adaptive.Run(ctx, net, nil, []int{top}, o)
				if err != nil {
					return err
				}
				errs = append(errs, math.Abs(res.Estimate.Marginals[0][1].P-p)/p)
				xs = append(xs, float64(res.Estimate.Samples+res.Learning.Samples))
			}
			ad[i].x, ad[i].y = append(ad[i].x, median(xs)), append(ad[i].y, median(errs))
		}
		logf(cfg, "plot: %d samples done", n)
	}
	all := append([]series{lw, lwTheory}, ad...)
	title := fmt.Sprintf("P(top event) = %.3g (%s, %d variables): relative error, median of %d seeds", p, c.name, len(net.Vars), seeds)
	alarms, alarmTitle, err := plotAlarms(ctx, cfg, grid, seeds)
	if err != nil {
		return err
	}
	return writeSVG(cfg.SVG, []panel{
		{title: title, ylabel: "relative error |p̂ − p| / p", ss: all},
		{title: alarmTitle, ylabel: "mean squared error", ss: alarms},
	})
}

// plotAlarms measures the mean squared error of the posterior marginals
// against the samples drawn (learning included) on the first network of
// the "alarms" placement, median over the seeds.
func plotAlarms(ctx context.Context, cfg Config, grid []int64, seeds int) ([]series, string, error) {
	var pl Placement
	for _, p := range Placements {
		if p.Name == "alarms" {
			pl = p
		}
	}
	c, err := newMSECase(pl, 0)
	if err != nil {
		return nil, "", err
	}
	lw := series{name: "likelihood weighting", color: "#c0392b"}
	ideal := series{name: "independent draws from the exact posterior (mean p(1-p)/N)", color: "#7f8c8d", dashed: true}
	var ad []series
	colors := []string{"#2471a3", "#1e8449"}
	for i, v := range Variants {
		ad = append(ad, series{name: "adaptive: " + v.Name, color: colors[i%len(colors)]})
	}
	for _, n := range grid {
		var errs []float64
		for s := 0; s < seeds; s++ {
			est, err := sampling.Run(ctx, c.net, c.ev, c.targets, sampling.Options{Method: sampling.MethodLikelihoodWeighting, Seed: uint64(s + 1),
				Stop: sampling.Stop{MaxSamples: n}, Workers: cfg.Workers})
			if err != nil {
				return nil, "", err
			}
			errs = append(errs, c.mse(est.Marginals))
		}
		lw.x, lw.y = append(lw.x, float64(n)), append(lw.y, median(errs))
		ideal.x, ideal.y = append(ideal.x, float64(n)), append(ideal.y, c.meanPQ()/float64(n))
		for i, v := range Variants {
			var errs, xs []float64
			for s := 0; s < seeds; s++ {
				o := v.Opt
				o.Seed, o.Workers, o.RareThreshold = uint64(s+1), cfg.Workers, -1
				o.Stop = sampling.Stop{MaxSamples: n}
				res, err := adaptive.Run(ctx, c.net, c.ev, c.targets, o)
				if err != nil {
					return nil, "", err
				}
				errs = append(errs, c.mse(res.Estimate.Marginals))
				xs = append(xs, float64(res.Estimate.Samples+res.Learning.Samples))
			}
			ad[i].x, ad[i].y = append(ad[i].x, median(xs)), append(ad[i].y, median(errs))
		}
		logf(cfg, "plot (alarms): %d samples done", n)
	}
	title := fmt.Sprintf("%d alarms, P(evidence) = %.3g (alarms %s, %d variables): posterior MSE, median of %d seeds",
		c.observed, math.Exp(c.post.LogEvidence), c.name, len(c.net.Vars), seeds)
	return append([]series{lw, ideal}, ad...), title, nil
}

// panel is one log-log chart of the plot.
type panel struct {
	title, ylabel string
	ss            []series
}

// writeSVG draws the panels one below the other.
func writeSVG(w io.Writer, panels []panel) error {
	const width, height = 760, 460
	var b strings.Builder
	fmt.Fprintf(&b, `<svg xmlns="http://www.w3.org/2000/svg" width="%d" height="%d" font-family="sans-serif" font-size="12">`+"\n", width, height*len(panels))
	fmt.Fprintf(&b, `<rect width="%d" height="%d" fill="white"/>`+"\n", width, height*len(panels))
	for i, p := range panels {
		fmt.Fprintf(&b, `<g transform="translate(0,%d)">`+"\n", i*height)
		writePanel(&b, p.title, p.ylabel, p.ss)
		b.WriteString("</g>\n")
	}
	b.WriteString("</svg>\n")
	_, err := io.WriteString(w, b.String())
	return err
}

// writePanel draws log-log lines with axes, ticks and a legend.
func writePanel(b *strings.Builder, title, ylabel string, ss []series) {
	const (
		width, height          = 760, 460
		left, right, top, bott = 80, 20, 40, 150
	)
	pw, ph := float64(width-left-right), float64(height-top-bott)
	xmin, xmax, ymin, ymax := math.Inf(1), math.Inf(-1), math.Inf(1), math.Inf(-1)
	for _, s := range ss {
		for i := range s.x {
			xmin, xmax = math.Min(xmin, s.x[i]), math.Max(xmax, s.x[i])
			if s.y[i] > 0 {
				ymin, ymax = math.Min(ymin, s.y[i]), math.Max(ymax, s.y[i])
			}
		}
	}
	lx0, lx1 := math.Floor(math.Log10(xmin)), math.Ceil(math.Log10(xmax))
	ly0, ly1 := math.Floor(math.Log10(math.Max(ymin, 1e-12))), math.Ceil(math.Log10(ymax))
	if ly1 <= ly0 {
		ly1 = ly0 + 1
	}
	px := func(x float64) float64 { return float64(left) + (math.Log10(x)-lx0)/(lx1-lx0)*pw }
	py := func(y float64) float64 {
		y = math.Max(y, math.Pow(10, ly0))
		return float64(top) + (ly1-math.Log10(y))/(ly1-ly0)*ph
	}
	fmt.Fprintf(b, `<text x="%d" y="22" font-size="13">%s</text>`+"\n", left, escape(title))
	fmt.Fprintf(b, `<rect x="%d" y="%d" width="%.0f" height="%.0f" fill="none" stroke="#444"/>`+"\n", left, top, pw, ph)
	for e := lx0; e <= lx1; e++ {
		x := px(math.Pow(10, e))
		fmt.Fprintf(b, `<line x1="%.1f" y1="%d" x2="%.1f" y2="%.1f" stroke="#ddd"/>`+"\n", x, top, x, float64(top)+ph)
		fmt.Fprintf(b, `<text x="%.1f" y="%.1f" text-anchor="middle">1e%d</text>`+"\n", x, float64(top)+ph+16, int(e))
	}
	for e := ly0; e <= ly1; e++ {
		y := py(math.Pow(10, e))
		fmt.Fprintf(b, `<line x1="%d" y1="%.1f" x2="%.1f" y2="%.1f" stroke="#ddd"/>`+"\n", left, y, float64(left)+pw, y)
		fmt.Fprintf(b, `<text x="%d" y="%.1f" text-anchor="end">1e%d</text>`+"\n", left-6, y+4, int(e))
	}
	fmt.Fprintf(b, `<text x="%.1f" y="%.1f" text-anchor="middle">samples drawn (learning included)</text>`+"\n", float64(left)+pw/2, float64(top)+ph+34)
	fmt.Fprintf(b, `<text transform="translate(18,%.1f) rotate(-90)" text-anchor="middle">%s</text>`+"\n", float64(top)+ph/2, escape(ylabel))
	for i, s := range ss {
		var pts []string
		for k := range s.x {
			pts = append(pts, fmt.Sprintf("%.1f,%.1f", px(s.x[k]), py(s.y[k])))
		}
		dash := ""
		if s.dashed {
			dash = ` stroke-dasharray="6,4"`
		}
		fmt.Fprintf(b, `<polyline points="%s" fill="none" stroke="%s" stroke-width="2"%s/>`+"\n", strings.Join(pts, " "), s.color, dash)
		if !s.dashed {
			for k := range s.x {
				fmt.Fprintf(b, `<circle cx="%.1f" cy="%.1f" r="3" fill="%s"/>`+"\n", px(s.x[k]), py(s.y[k]), s.color)
			}
		}
		ly := float64(top) + ph + 56 + float64(i)*18
		fmt.Fprintf(b, `<line x1="%d" y1="%.1f" x2="%d" y2="%.1f" stroke="%s" stroke-width="2"%s/>`+"\n", left, ly-4, left+30, ly-4, s.color, dash)
		fmt.Fprintf(b, `<text x="%d" y="%.1f">%s</text>`+"\n", left+38, ly, escape(s.name))
	}
}

func escape(s string) string {
	r := strings.NewReplacer("&", "&amp;", "<", "&lt;", ">", "&gt;")
	return r.Replace(s)
}
