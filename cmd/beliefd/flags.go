package main

import (
	"errors"
	"flag"
	"fmt"
	"io"
	"strconv"
	"strings"
)

// errHelp is returned when -h was asked for and the help was printed.
var errHelp = errors.New("help shown")

// newFlagSet returns a flag set that reports errors instead of exiting.
func newFlagSet(name, synopsis string, out io.Writer) *flag.FlagSet {
	fs := flag.NewFlagSet(name, flag.ContinueOnError)
	fs.SetOutput(out)
	fs.Usage = func() {
		fmt.Fprintf(out, "usage: beliefd %s\n\nflags:\n", synopsis)
		fs.SetOutput(out)
		fs.PrintDefaults()
	}
	return fs
}

// parseFlags parses args; help and flag errors come back as errHelp and errUsage.
func parseFlags(fs *flag.FlagSet, args []string) error {
	fs.SetOutput(io.Discard)
	usage := fs.Usage
	fs.Usage = func() {} // shown once below, not on every parse error
	err := fs.Parse(args)
	fs.Usage = usage
	switch {
	case errors.Is(err, flag.ErrHelp):
		fs.Usage()
		return errHelp
	case err != nil:
		return fmt.Errorf("%w: %v", errUsage, err)
	}
	return nil
}

// multiFlag collects a repeated flag; each use may hold comma-separated items.
type multiFlag []string

func (m *multiFlag) String() string { return strings.Join(*m, ",") }
func (m *multiFlag) Set(v string) error {
	*m = append(*m, v)
	return nil
}

// parseEvidence reads "var=state" items (repeated or comma-separated).
func parseEvidence(items []string) (map[string]string, error) {
	out := map[string]string{}
	for _, item := range items {
		for _, kv := range strings.Split(item, ",") {
			kv = strings.TrimSpace(kv)
			if kv == "" {
				continue
			}
			name, state, ok := strings.Cut(kv, "=")
			name, state = strings.TrimSpace(name), strings.TrimSpace(state)
			if !ok || name == "" || state == "" {
				return nil, fmt.Errorf("%w: --evidence %q: want var=state", errUsage, kv)
			}
			if prev, dup := out[name]; dup && prev != state {
				return nil, fmt.Errorf("%w: --evidence sets %q twice (%s and %s)", errUsage, name, prev, state)
			}
			out[name] = state
		}
	}
	return out, nil
}

// parseSoft reads "var=l1,l2,..." items, one variable per flag use.
func parseSoft(items []string) (map[string][]float64, error) {
	out := map[string][]float64{}
	for _, item := range items {
		name, list, ok := strings.Cut(item, "=")
		name = strings.TrimSpace(name)
		if !ok || name == "" || list == "" {
			return nil, fmt.Errorf("%w: --soft %q: want var=l1,l2,... (one likelihood per state)", errUsage, item)
		}
		if _, dup := out[name]; dup {
			return nil, fmt.Errorf("%w: --soft gives %q twice", errUsage, name)
		}
		for _, f := range strings.Split(list, ",") {
			x, err := strconv.ParseFloat(strings.TrimSpace(f), 64)
			if err != nil {
				return nil, fmt.Errorf("%w: --soft %q: %q is not a number", errUsage, item, f)
			}
			out[name] = append(out[name], x)
		}
	}
	return out, nil
}

// splitList reads comma-separated names from repeated flags.
func splitList(items []string) []string {
	var out []string
	for _, item := range items {
		for _, s := range strings.Split(item, ",") {
			if s = strings.TrimSpace(s); s != "" {
				out = append(out, s)
			}
		}
	}
	return out
}
