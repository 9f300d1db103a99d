package main

import (
	"encoding/json"
	"fmt"
	"io"
	"math"
	"sort"
	"strings"
	"text/tabwriter"

	"github.com/beliefd/beliefd/service/infer"
	"github.com/beliefd/beliefd/service/model"
	"github.com/beliefd/beliefd/service/sampling"
)

// prob renders a probability with four significant digits, switching to
// scientific notation below 0.01 so that small values keep their digits.
func prob(p float64) string {
	switch {
	case p == 0:
		return "0"
	case p == 1:
		return "1"
	case p < 1e-2:
		return fmt.Sprintf("%.3e", p)
	}
	return fmt.Sprintf("%.4f", p)
}

func interval(iv sampling.Interval, exact bool) string {
	if exact {
		return "exact"
	}
	return fmt.Sprintf("[%s, %s]", prob(iv.Lo), prob(iv.Hi))
}

func printResult(w io.Writer, net *model.Network, q *infer.Query, r *infer.Result) {
	exact := r.Method == infer.MethodExact
	fmt.Fprintf(w, "model    %s (%s…)\n", net.Name, net.Hash[:12])
	fmt.Fprintf(w, "method   %s", r.Method)
	if r.MethodReason != "" && r.MethodReason != "requested" {
		fmt.Fprintf(w, " (%s)", r.MethodReason)
	}
	fmt.Fprintln(w)
	if len(q.Evidence) > 0 || len(q.SoftEvidence) > 0 {
		var parts []string
		for _, k := range sortedKeys(q.Evidence) {
			parts = append(parts, k+"="+q.Evidence[k])
		}
		for _, k := range sortedKeys(q.SoftEvidence) {
			parts = append(parts, fmt.Sprintf("%s~%v", k, q.SoftEvidence[k]))
		}
		fmt.Fprintf(w, "evidence %s\n", strings.Join(parts, ", "))
	}
	if ep := r.EvidenceProbability; ep != nil {
		l := "-inf"
		if ep.Log10 != nil {
			l = fmt.Sprintf("%.3f", *ep.Log10)
		}
		if exact {
			fmt.Fprintf(w, "P(evidence) = %s  (log10 %s)\n", prob(ep.P), l)
		} else {
			fmt.Fprintf(w, "P(evidence) = %s  %s at %g%%  (log10 %s)\n", prob(ep.P), interval(sampling.Interval{P: ep.P, Lo: ep.Lo, Hi: ep.Hi}, false), 100*r.Confidence, l)
		}
	}
	fmt.Fprintln(w)
	tw := tabwriter.NewWriter(w, 2, 4, 2, ' ', 0)
	head := "variable\tstate\tprobability"
	if !exact {
		head += fmt.Sprintf("\t%g%% interval", 100*r.Confidence)
	}
	fmt.Fprintln(tw, head)
	names, states := r.Targets()
	for i, name := range names {
		for k, s := range states[i] {
			iv := r.Marginals[name][s]
			label := name
			if k > 0 {
				label = ""
			}
			line := fmt.Sprintf("%s\t%s\t%s", label, s, prob(iv.P))
			if !exact {
				line += "\t" + interval(iv, false)
			}
			fmt.Fprintln(tw, line)
		}
	}
	tw.Flush()
	if r.MPE != nil {
		fmt.Fprintln(w)
		fmt.Fprintf(w, "most probable explanation: P = %s given the evidence (joint %s)\n", prob(r.MPE.P), prob(r.MPE.Joint))
		tw := tabwriter.NewWriter(w, 2, 4, 2, ' ', 0)
		for _, v := range net.DocOrder {
			n := net.Vars[v].Name
			fmt.Fprintf(tw, "  %s\t%s\n", n, r.MPE.Assignment[n])
		}
		tw.Flush()
	}
	fmt.Fprintln(w)
	if exact {
		fmt.Fprintf(w, "exact answer in %s\n", seconds(r.ElapsedSeconds))
	} else {
		fmt.Fprintf(w, "samples %s   effective %s   stopped by %s   %s   seed %d\n",
			groupDigits(float64(r.Samples)), groupDigits(r.EffectiveSamples), r.StopReason, seconds(r.ElapsedSeconds), r.Seed)
	}
	if d := r.Diagnostics; d != nil {
		if d.AcceptanceRate != nil {
			fmt.Fprintf(w, "acceptance rate %s\n", prob(*d.AcceptanceRate))
		}
		if d.MaxWeightShare != nil {
			fmt.Fprintf(w, "largest weight share %s\n", prob(*d.MaxWeightShare))
		}
		if len(d.RHat) > 0 {
			worst, wname := 0.0, ""
			for n, x := range d.RHat {
				if x > worst {
					worst, wname = x, n
				}
			}
			fmt.Fprintf(w, "worst split R-hat %.4f (%s)\n", worst, wname)
		}
	}
	for _, warn := range r.Warnings {
		fmt.Fprintf(w, "warning: %s\n", warn)
	}
	fmt.Fprintf(w, "caution: %s\n", r.Caution)
}

func seconds(s float64) string {
	switch {
	case s < 1e-3:
		return fmt.Sprintf("%.0f µs", s*1e6)
	case s < 1:
		return fmt.Sprintf("%.1f ms", s*1e3)
	}
	return fmt.Sprintf("%.2f s", s)
}

// groupDigits renders 1234567.8 as 1,234,568.
func groupDigits(x float64) string {
	if math.IsNaN(x) || math.IsInf(x, 0) {
		return fmt.Sprint(x)
	}
	s := fmt.Sprintf("%.0f", x)
	var b strings.Builder
	for i, c := range s {
		if i > 0 && (len(s)-i)%3 == 0 {
			b.WriteByte(',')
		}
		b.WriteRune(c)
	}
	return b.String()
}

func sortedKeys[V any](m map[string]V) []string {
	keys := make([]string, 0, len(m))
	for k := range m {
		keys = append(keys, k)
	}
	sort.Strings(keys)
	return keys
}

func writeJSON(w io.Writer, v any) error {
	enc := json.NewEncoder(w)
	enc.SetIndent("", "  ")
	return enc.Encode(v)
}
