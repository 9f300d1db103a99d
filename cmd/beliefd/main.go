// Command beliefd answers probability questions about discrete Bayesian
// networks: exact inference where the model allows it, and sampling with
// confidence intervals where it does not.
//
//	beliefd run --model FILE [--evidence var=state ...] [--json] ...
//	beliefd check FILE
//	beliefd example [NAME]
//
// Run "beliefd help" or "beliefd COMMAND -h" for the flags.
package main

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"os/signal"
	"syscall"
)

// exitUsage is the exit code for a command line that cannot be understood.
const exitUsage = 2

// errUsage marks an error in the command line itself.
var errUsage = errors.New("usage")

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	os.Exit(run(ctx, os.Args[1:], os.Stdin, os.Stdout, os.Stderr))
}

type command struct {
	name, summary string
	run           func(ctx context.Context, args []string, stdout, stderr io.Writer) error
}

func commands() []command {
	return []command{
		{"run", "answer a query on a model file: posteriors, P(evidence), MPE", cmdRun},
		{"check", "validate a model file and summarise it", cmdCheck},
		{"example", "list the example models, or print one as a model document", cmdExample},
		{"serve", "run the HTTP and gRPC service (embedded store by default, or --redis)", cmdServe},
		{"worker", "run sampling workers that take their work from Redis", cmdWorker},
		{"submit", "submit a query to a running server as a job (--watch to follow it)", cmdSubmit},
		{"watch", "follow a job as its estimates tighten, then print its result", cmdWatch},
		{"get", "print a job's latest result", cmdGet},
		{"cancel", "cancel a job", cmdCancel},
		{"jobs", "list the newest jobs", cmdJobs},
		{"models", "list, store, print or delete the models of a running server", cmdModels},
		{"standing", "register standing queries, update their evidence, show their latest posteriors", cmdStanding},
		{"token", "mint an API token for a tenant and print its entry for the tenants document", cmdToken},
		{"tenants", "list the tenants with their unfinished jobs and quotas (admin token)", cmdTenants},
	}
}

func run(ctx context.Context, args []string, _ io.Reader, stdout, stderr io.Writer) int {
	if len(args) == 0 || args[0] == "help" || args[0] == "-h" || args[0] == "--help" {
		usage(stdout)
		if len(args) == 0 {
			return exitUsage
		}
		return 0
	}
	for _, c := range commands() {
		if c.name == args[0] {
			err := c.run(ctx, args[1:], stdout, stderr)
			switch {
			case err == nil:
				return 0
			case errors.Is(err, errHelp):
				return 0
			case errors.Is(err, errUsage):
				fmt.Fprintf(stderr, "beliefd %s: %v\n", c.name, err)
				fmt.Fprintf(stderr, "run 'beliefd %s -h' for the flags\n", c.name)
				return exitUsage
			default:
				fmt.Fprintf(stderr, "beliefd %s: %v\n", c.name, err)
				return 1
			}
		}
	}
	fmt.Fprintf(stderr, "beliefd: unknown command %q\n", args[0])
	usage(stderr)
	return exitUsage
}

func usage(w io.Writer) {
	fmt.Fprintln(w, "beliefd: probabilities from discrete Bayesian networks, with honest error bars")
	fmt.Fprintln(w)
	fmt.Fprintln(w, "usage: beliefd COMMAND [flags]")
	fmt.Fprintln(w)
	for _, c := range commands() {
		fmt.Fprintf(w, "  %-8s %s\n", c.name, c.summary)
	}
	fmt.Fprintln(w)
	fmt.Fprintln(w, "Run 'beliefd COMMAND -h' for the flags of a command.")
}
