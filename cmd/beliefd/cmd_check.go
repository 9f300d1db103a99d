package main

import (
	"context"
	"fmt"
	"io"

	"github.com/beliefd/beliefd/service/exact"
	"github.com/beliefd/beliefd/service/model"
)

func cmdCheck(_ context.Context, args []string, stdout, _ io.Writer) error {
	fs := newFlagSet("check", "check [--exact-limit N] FILE", stdout)
	exactLimit := fs.Int("exact-limit", 0, "largest junction tree (total table entries) exact inference may build (default 50,000,000)")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if fs.NArg() != 1 {
		return fmt.Errorf("%w: give exactly one model file", errUsage)
	}
	path := fs.Arg(0)
	doc, err := readDocument(path)
	if err != nil {
		return err
	}
	net, err := model.Compile(doc, model.Limits{})
	if err != nil {
		return fmt.Errorf("%s: %w", path, err)
	}
	limit := *exactLimit
	if limit <= 0 {
		limit = exact.DefaultMaxEntries
	}
	cost := exact.EstimateCost(net)
	kinds := map[string]int{}
	maxStates, maxParents := 0, 0
	for i := range net.Vars {
		n := &net.Vars[i]
		kinds[n.Kind]++
		maxStates = max(maxStates, n.Card())
		maxParents = max(maxParents, len(n.Parents))
	}
	fmt.Fprintf(stdout, "%s: valid\n", path)
	fmt.Fprintf(stdout, "  model            %s\n", net.Name)
	fmt.Fprintf(stdout, "  content hash     %s\n", net.Hash)
	fmt.Fprintf(stdout, "  variables        %d (up to %d states)\n", len(net.Vars), maxStates)
	fmt.Fprintf(stdout, "  arcs             %d (up to %d parents)\n", net.Arcs, maxParents)
	fmt.Fprintf(stdout, "  free parameters  %s (%s table entries)\n", groupDigits(float64(net.FreeParameters())), groupDigits(float64(net.TableEntries())))
	fmt.Fprintf(stdout, "  distributions   ")
	for _, k := range sortedKeys(kinds) {
		fmt.Fprintf(stdout, " %s %d", k, kinds[k])
	}
	fmt.Fprintln(stdout)
	fmt.Fprintf(stdout, "  exact inference  junction tree of %d cliques, treewidth %d, largest clique %s entries, %s entries in all\n",
		cost.Cliques, cost.Treewidth, groupDigits(float64(cost.LargestClique)), groupDigits(float64(cost.TotalEntries)))
	if cost.TotalEntries <= limit {
		fmt.Fprintf(stdout, "                   within the limit of %s: method auto uses exact inference\n", groupDigits(float64(limit)))
	} else {
		fmt.Fprintf(stdout, "                   above the limit of %s: method auto samples instead\n", groupDigits(float64(limit)))
	}
	return nil
}
