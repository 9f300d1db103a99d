// Command beliefd-load drives a beliefd deployment for longer, manual load
// and scale runs than the tests make.
//
//	beliefd-load load  [--url URL] [--clients N] [--duration D] [--samples N] [--allow-remote]
//	beliefd-load scale [--workers 1,2,4] [--vars N] [--samples N] [--beliefd PATH] [--redis-server PATH]
//	beliefd-load scale --url URL [--vars N] [--samples N] [--allow-remote]
//
// load: concurrent clients submit small jobs to URL and poll them for a
// fixed time, backing off on 429; it reports requests per second, latency
// percentiles, statuses, jobs accepted and the queue depth from /metrics.
//
// scale: measures the sampling throughput of one long likelihood-weighting
// job on a generated model. Without --url it starts, for each worker count
// in --workers, a private redis-server with its append-only file on, one
// API process and that many `beliefd worker --workers 1` processes, all on
// 127.0.0.1, and stops them after the run. With --url it measures the
// deployment behind URL as it is (scale its workers between runs).
//
// Every loop is bounded in count and time. Targets other than loopback
// addresses need --allow-remote.
package main

import (
	"context"
	"errors"
	"flag"
	"fmt"
	"io"
	"net"
	"net/url"
	"os"
	"os/signal"
	"syscall"
)

func main() {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	os.Exit(run(ctx, os.Args[1:], os.Stdout, os.Stderr))
}

// errUsage marks a command line that cannot be understood (exit 2).
var errUsage = errors.New("usage")

func run(ctx context.Context, args []string, stdout, stderr io.Writer) int {
	if len(args) == 0 {
		fmt.Fprintln(stderr, "usage: beliefd-load load|scale [flags]   (beliefd-load load -h for the flags)")
		return 2
	}
	var err error
	switch args[0] {
	case "load":
		err = cmdLoad(ctx, args[1:], stdout)
	case "scale":
		err = cmdScale(ctx, args[1:], stdout)
	default:
		err = fmt.Errorf("%w: unknown command %q (want load or scale)", errUsage, args[0])
	}
	switch {
	case err == nil:
		return 0
	case errors.Is(err, flag.ErrHelp):
		return 0
	case errors.Is(err, errUsage):
		fmt.Fprintln(stderr, "beliefd-load:", err)
		return 2
	}
	fmt.Fprintln(stderr, "beliefd-load:", err)
	return 1
}

// checkTarget refuses a base URL whose host is not a loopback address
// unless remote targets are allowed.
func checkTarget(base string, allowRemote bool) error {
	u, err := url.Parse(base)
	if err != nil || (u.Scheme != "http" && u.Scheme != "https") || u.Host == "" {
		return fmt.Errorf("%w: --url %q: want http://HOST:PORT", errUsage, base)
	}
	if allowRemote {
		return nil
	}
	host := u.Hostname()
	if host == "localhost" {
		return nil
	}
	if ip := net.ParseIP(host); ip != nil && ip.IsLoopback() {
		return nil
	}
	return fmt.Errorf("%w: --url %q is not a loopback address; give --allow-remote to drive a deployment elsewhere", errUsage, base)
}
