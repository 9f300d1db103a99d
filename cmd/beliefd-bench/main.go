// Command beliefd-bench measures the adaptive importance sampler against
// likelihood weighting on generated failure-propagation and random
// networks whose exact answers are known, prints the tables and writes an
// SVG plot of error against samples (relative error of a rare top event,
// mean squared error of the posterior marginals with alarms observed).
//
//	go run ./cmd/beliefd-bench [-quick] [-svg FILE] [-seeds N] [-workers N] [-parts top,evidence,mse] [-v]
package main

import (
	"context"
	"flag"
	"fmt"
	"io"
	"os"
	"os/signal"
	"strings"

	"github.com/beliefd/beliefd/service/sampling/adaptive/adaptivebench"
)

func main() {
	os.Exit(run(os.Args[1:], os.Stdout, os.Stderr))
}

func run(args []string, stdout, stderr io.Writer) int {
	fs := flag.NewFlagSet("beliefd-bench", flag.ContinueOnError)
	fs.SetOutput(stderr)
	quick := fs.Bool("quick", false, "smaller cases, fewer seeds, shorter runs (about a minute)")
	svg := fs.String("svg", "", "write the plots of error against samples (rare top event; posterior with alarms observed) to this SVG file")
	seeds := fs.Int("seeds", 0, "repeated runs per case (default 6, or 3 with -quick)")
	workers := fs.Int("workers", 0, "sampling goroutines per run (default one per core)")
	verbose := fs.Bool("v", false, "print progress on stderr")
	parts := fs.String("parts", "", "comma-separated tables to measure: top, evidence, mse (default all)")
	if err := fs.Parse(args); err != nil {
		return 2
	}
	if fs.NArg() > 0 {
		fmt.Fprintf(stderr, "beliefd-bench: unexpected argument %q\n", fs.Arg(0))
		return 2
	}
	if *seeds < 0 || *workers < 0 {
		fmt.Fprintln(stderr, "beliefd-bench: -seeds and -workers must be positive")
		return 2
	}
	cfg := adaptivebench.Config{Quick: *quick, Seeds: *seeds, Workers: *workers}
	if *parts != "" {
		cfg.Parts = strings.Split(*parts, ",")
	}
	if *verbose {
		cfg.Log = stderr
	}
	var f *os.File
	if *svg != "" {
		var err error
		if f, err = os.Create(*svg); err != nil {
			fmt.Fprintf(stderr, "beliefd-bench: %v\n", err)
			return 1
		}
		cfg.SVG = f
	}
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt)
	defer stop()
	err := adaptivebench.Run(ctx, stdout, cfg)
	if f != nil {
		if cerr := f.Close(); err == nil {
			err = cerr
		}
	}
	if err != nil {
		fmt.Fprintf(stderr, "beliefd-bench: %v\n", err)
		return 1
	}
	if *svg != "" {
		fmt.Fprintf(stdout, "plot written to %s\n", *svg)
	}
	return 0
}
