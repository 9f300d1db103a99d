package main

import (
	"context"
	"crypto/tls"
	"crypto/x509"
	"errors"
	"flag"
	"fmt"
	"io"
	"net"
	"os"
	"strings"
	"text/tabwriter"
	"time"

	"google.golang.org/genproto/googleapis/rpc/errdetails"
	"google.golang.org/grpc"
	"google.golang.org/grpc/codes"
	"google.golang.org/grpc/credentials"
	"google.golang.org/grpc/credentials/insecure"
	"google.golang.org/grpc/status"

	"github.com/beliefd/beliefd/api/convert"
	beliefv1 "github.com/beliefd/beliefd/proto/belief/v1"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/model"
)

// client is a connection to a running beliefd over gRPC.
type client struct {
	conn   *grpc.ClientConn
	models beliefv1.ModelServiceClient
	jobs   beliefv1.JobServiceClient
}

func serverFlag(fs *flag.FlagSet) *string {
	def := "localhost:9090"
	if v, ok := os.LookupEnv("BELIEFD_SERVER"); ok && v != "" {
		def = v
	}
	return fs.String("server", def, "gRPC address of a running beliefd (env BELIEFD_SERVER)")
}

// endpoint is where and how a client command reaches a server: the
// address, the bearer token and TLS.
type endpoint struct {
	server, token, ca *string
	tls               *bool
}

// envOr is the value of an environment variable, or def.
func envOr(name, def string) string {
	if v, ok := os.LookupEnv(name); ok && v != "" {
		return v
	}
	return def
}

// endpointFlags registers --server, --token, --ca and --tls.
func endpointFlags(fs *flag.FlagSet) *endpoint {
	e := &endpoint{server: serverFlag(fs)}
	e.token = fs.String("token", envOr("BELIEFD_TOKEN", ""), "bearer token of a server that requires tokens (env BELIEFD_TOKEN; prefer the variable: flags show in process lists)")
	e.ca = fs.String("ca", envOr("BELIEFD_CA", ""), "PEM file of the certificate authority that signed the server's TLS certificate; connects with TLS (env BELIEFD_CA)")
	tlsDef := false
	if v := envOr("BELIEFD_TLS", ""); v == "1" || strings.EqualFold(v, "true") {
		tlsDef = true
	}
	e.tls = fs.Bool("tls", tlsDef, "connect with TLS, trusting the system's certificate authorities (env BELIEFD_TLS)")
	return e
}

func (e *endpoint) dial() (*client, error) { return dialWith(*e.server, *e.token, *e.ca, *e.tls) }

// dial connects to addr with the token and TLS settings of the
// environment (BELIEFD_TOKEN, BELIEFD_CA, BELIEFD_TLS).
func dial(addr string) (*client, error) {
	v := envOr("BELIEFD_TLS", "")
	return dialWith(addr, envOr("BELIEFD_TOKEN", ""), envOr("BELIEFD_CA", ""), v == "1" || strings.EqualFold(v, "true"))
}

// dialWith connects to addr: with TLS when ca is given or useTLS is set,
// sending token with every call. A token goes over an unencrypted
// connection only to a loopback address.
func dialWith(addr, token, ca string, useTLS bool) (*client, error) {
	creds := insecure.NewCredentials()
	switch {
	case ca != "":
		pem, err := os.ReadFile(ca)
		if err != nil {
			return nil, fmt.Errorf("%w: --ca: %v", errUsage, err)
		}
		pool := x509.NewCertPool()
		if !pool.AppendCertsFromPEM(pem) {
			return nil, fmt.Errorf("%w: --ca %s holds no PEM certificate", errUsage, ca)
		}
		creds = credentials.NewTLS(&tls.Config{RootCAs: pool, MinVersion: tls.VersionTLS12})
	case useTLS:
		creds = credentials.NewTLS(&tls.Config{MinVersion: tls.VersionTLS12})
	}
	opts := []grpc.DialOption{grpc.WithTransportCredentials(creds)}
	if token != "" {
		if ca == "" && !useTLS && !loopbackTarget(addr) {
			return nil, fmt.Errorf("%w: a token would cross the network to %s unencrypted: connect with TLS (--ca FILE or --tls)", errUsage, addr)
		}
		opts = append(opts, grpc.WithPerRPCCredentials(bearer(token)))
	}
	conn, err := grpc.NewClient(addr, opts...)
	if err != nil {
		return nil, fmt.Errorf("%w: --server %q: %v", errUsage, addr, err)
	}
	return &client{conn: conn, models: beliefv1.NewModelServiceClient(conn), jobs: beliefv1.NewJobServiceClient(conn)}, nil
}

// loopbackTarget reports whether a gRPC target HOST:PORT is on this machine.
func loopbackTarget(addr string) bool {
	host, _, err := net.SplitHostPort(strings.TrimPrefix(addr, "dns:///"))
	if err != nil {
		return false
	}
	ip := net.ParseIP(host)
	return host == "localhost" || (ip != nil && ip.IsLoopback())
}

// bearer sends a token with every call.
type bearer string

func (b bearer) GetRequestMetadata(context.Context, ...string) (map[string]string, error) {
	return map[string]string{"authorization": "Bearer " + string(b)}, nil
}

// RequireTransportSecurity is false: dialWith sends a token in the clear
// to loopback addresses only.
func (b bearer) RequireTransportSecurity() bool { return false }

// rpcError turns a gRPC status into a message a user can act on, with the
// fields at fault.
func rpcError(addr string, err error) error {
	st, ok := status.FromError(err)
	if !ok {
		return err
	}
	msg := st.Message()
	switch st.Code() {
	case codes.Unavailable:
		msg = fmt.Sprintf("cannot reach beliefd at %s (is 'beliefd serve' running? set --server; --ca or --tls for a server with TLS): %s", addr, st.Message())
	case codes.Unauthenticated:
		msg += " (give the token with --token or BELIEFD_TOKEN)"
	}
	var b strings.Builder
	b.WriteString(msg)
	for _, d := range st.Details() {
		if br, ok := d.(*errdetails.BadRequest); ok {
			for _, v := range br.GetFieldViolations() {
				if !strings.Contains(msg, v.GetDescription()) {
					fmt.Fprintf(&b, "\n  %s: %s", v.GetField(), v.GetDescription())
				}
			}
		}
	}
	return fmt.Errorf("%s (%s)", b.String(), st.Code())
}

// jobView turns a job message into the job record and its result, ordered
// for display with the job's model when the server still has it.
func (c *client) jobView(ctx context.Context, m *beliefv1.Job) (*jobs.Job, *model.Network, error) {
	j, err := convert.JobFromProto(m)
	if err != nil {
		return nil, nil, err
	}
	var net *model.Network
	if resp, err := c.models.GetModel(ctx, &beliefv1.GetModelRequest{Name: j.Model.Name, Version: int64(j.Model.Version)}); err == nil {
		if n, err := model.Compile(convert.ModelFromProto(resp.GetModel()), model.Limits{}); err == nil {
			net = n
		}
	}
	if j.Result != nil && net != nil {
		j.Result.SetOrder(net)
	}
	return j, net, nil
}

func printJob(w io.Writer, j *jobs.Job, net *model.Network, asJSON bool) error {
	if asJSON {
		return printOut(w, net, &j.Query, j.Result, true)
	}
	fmt.Fprintf(w, "job      %s  %s  (priority %s, created %s)\n", j.ID, j.State, j.Priority, j.CreatedAt.Local().Format(time.DateTime))
	if j.Error != "" {
		fmt.Fprintf(w, "error    %s\n", j.Error)
	}
	if j.Result == nil || net == nil {
		if j.Result != nil {
			fmt.Fprintln(w, "(the model is no longer stored; use --json for the result document)")
		}
		return nil
	}
	printResult(w, net, &j.Query, j.Result)
	return nil
}

func cmdSubmit(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	fs := newFlagSet("submit", "submit --model NAME[@VERSION] [flags]", stdout)
	ep := endpointFlags(fs)
	server := ep.server
	modelRef := fs.String("model", "", "name (or name@version) of a model stored on the server")
	priority := fs.String("priority", "normal", "low, normal or high")
	idem := fs.String("idempotency-key", "", "submitting twice with the same key returns the first job")
	watch := fs.Bool("watch", false, "follow the job until it ends and print its result")
	asJSON := fs.Bool("json", false, "print the result document as JSON (with --watch)")
	qf := bindQueryFlags(fs)
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	if *modelRef == "" {
		return fmt.Errorf("%w: give --model NAME (list them with 'beliefd models')", errUsage)
	}
	q, err := qf.query(fs, *modelRef)
	if err != nil {
		return err
	}
	q.Priority, q.IdempotencyKey = *priority, *idem
	if err := q.Validate(); err != nil {
		return fmt.Errorf("%w: %v", errUsage, err)
	}
	c, err := ep.dial()
	if err != nil {
		return err
	}
	defer c.conn.Close()
	resp, err := c.jobs.SubmitJob(ctx, &beliefv1.SubmitJobRequest{Query: convert.QueryToProto(q)})
	if err != nil {
		return rpcError(*server, err)
	}
	id := resp.GetJob().GetId()
	if !*watch {
		if resp.GetCreated() {
			fmt.Fprintf(stdout, "%s\n", id)
		} else {
			fmt.Fprintf(stdout, "%s (existing job of this idempotency key)\n", id)
		}
		return nil
	}
	fmt.Fprintf(stderr, "job %s submitted\n", id)
	return c.follow(ctx, *server, id, stdout, stderr, *asJSON)
}

// follow streams a job's updates with a progress line and prints the final state.
func (c *client) follow(ctx context.Context, server, id string, stdout, stderr io.Writer, asJSON bool) error {
	stream, err := c.jobs.WatchJob(ctx, &beliefv1.WatchJobRequest{Id: id})
	if err != nil {
		return rpcError(server, err)
	}
	var line *progressLine
	if isTerminal(stderr) {
		line = &progressLine{w: stderr, start: time.Now()}
	}
	var last *beliefv1.Job
	for {
		m, err := stream.Recv()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			if line != nil {
				line.clear()
			}
			if ctx.Err() != nil {
				fmt.Fprintf(stderr, "stopped watching; the job goes on: 'beliefd watch %s'\n", id)
				return nil
			}
			return rpcError(server, err)
		}
		last = m
		if line != nil && m.GetResult() != nil {
			if line.stop.MaxSamples == 0 {
				if st := m.GetStop(); st != nil {
					line.stop.MaxSamples = st.GetMaxSamples()
					line.stop.AbsErr = st.GetAbsErr()
				}
			}
			line.update(convert.ResultFromProto(m.GetResult()))
		}
	}
	if line != nil {
		line.clear()
	}
	if last == nil {
		return fmt.Errorf("job %s: the stream ended without a state", id)
	}
	j, net, err := c.jobView(ctx, last)
	if err != nil {
		return err
	}
	if err := printJob(stdout, j, net, asJSON); err != nil {
		return err
	}
	if j.State == jobs.StateFailed {
		return fmt.Errorf("job %s failed: %s", j.ID, j.Error)
	}
	return nil
}

// oneJobCommand parses "COMMAND [flags] ID".
func oneJobCommand(name string, args []string, stdout io.Writer) (*client, string, string, *bool, error) {
	fs := newFlagSet(name, name+" [--server ADDR] [--token T] [--json] JOB_ID", stdout)
	ep := endpointFlags(fs)
	server := ep.server
	asJSON := fs.Bool("json", false, "print the result document as JSON")
	if err := parseFlags(fs, args); err != nil {
		return nil, "", "", nil, err
	}
	if fs.NArg() != 1 {
		return nil, "", "", nil, fmt.Errorf("%w: give one job ID (list them with 'beliefd jobs')", errUsage)
	}
	c, err := ep.dial()
	if err != nil {
		return nil, "", "", nil, err
	}
	return c, *server, fs.Arg(0), asJSON, nil
}

func cmdWatch(ctx context.Context, args []string, stdout, stderr io.Writer) error {
	c, server, id, asJSON, err := oneJobCommand("watch", args, stdout)
	if err != nil {
		return err
	}
	defer c.conn.Close()
	return c.follow(ctx, server, id, stdout, stderr, *asJSON)
}

func cmdGet(ctx context.Context, args []string, stdout, _ io.Writer) error {
	c, server, id, asJSON, err := oneJobCommand("get", args, stdout)
	if err != nil {
		return err
	}
	defer c.conn.Close()
	m, err := c.jobs.GetJob(ctx, &beliefv1.GetJobRequest{Id: id})
	if err != nil {
		return rpcError(server, err)
	}
	j, net, err := c.jobView(ctx, m)
	if err != nil {
		return err
	}
	return printJob(stdout, j, net, *asJSON)
}

func cmdCancel(ctx context.Context, args []string, stdout, _ io.Writer) error {
	c, server, id, _, err := oneJobCommand("cancel", args, stdout)
	if err != nil {
		return err
	}
	defer c.conn.Close()
	m, err := c.jobs.CancelJob(ctx, &beliefv1.CancelJobRequest{Id: id})
	if err != nil {
		return rpcError(server, err)
	}
	fmt.Fprintf(stdout, "%s %s\n", m.GetId(), convert.StateFromProto(m.GetState()))
	return nil
}

func cmdJobs(ctx context.Context, args []string, stdout, _ io.Writer) error {
	fs := newFlagSet("jobs", "jobs [--server ADDR] [--token T] [--limit N]", stdout)
	ep := endpointFlags(fs)
	server := ep.server
	limit := fs.Int("limit", 20, "how many of the newest jobs to list")
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	c, err := ep.dial()
	if err != nil {
		return err
	}
	defer c.conn.Close()
	resp, err := c.jobs.ListJobs(ctx, &beliefv1.ListJobsRequest{PageSize: int32(*limit)})
	if err != nil {
		return rpcError(*server, err)
	}
	tw := tabwriter.NewWriter(stdout, 2, 4, 2, ' ', 0)
	fmt.Fprintln(tw, "id\tstate\tmethod\tmodel\tsamples\tcreated")
	for _, m := range resp.GetJobs() {
		samples := int64(0)
		if r := m.GetResult(); r != nil {
			samples = r.GetSamples()
		}
		fmt.Fprintf(tw, "%s\t%s\t%s\t%s@%d\t%s\t%s\n", m.GetId(), convert.StateFromProto(m.GetState()), m.GetMethod(),
			m.GetModel().GetName(), m.GetModel().GetVersion(), groupDigits(float64(samples)), m.GetCreatedAt().AsTime().Local().Format(time.DateTime))
	}
	return tw.Flush()
}

func cmdModels(ctx context.Context, args []string, stdout, _ io.Writer) error {
	fs := newFlagSet("models", "models [--server ADDR] [--token T] [list | put FILE | get NAME[@VERSION] | delete NAME]", stdout)
	ep := endpointFlags(fs)
	server := ep.server
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	verb := "list"
	if fs.NArg() > 0 {
		verb = fs.Arg(0)
	}
	rest := fs.Args()
	if len(rest) > 0 {
		rest = rest[1:]
	}
	need := map[string]int{"list": 0, "put": 1, "get": 1, "delete": 1}
	n, known := need[verb]
	if !known {
		return fmt.Errorf("%w: unknown models action %q (want list, put, get or delete)", errUsage, verb)
	}
	if len(rest) != n {
		return fmt.Errorf("%w: models %s takes %d argument(s)", errUsage, verb, n)
	}
	c, err := ep.dial()
	if err != nil {
		return err
	}
	defer c.conn.Close()
	switch verb {
	case "put":
		doc, err := readDocument(rest[0])
		if err != nil {
			return err
		}
		msg, err := convert.ModelToProto(doc)
		if err != nil {
			return err
		}
		resp, err := c.models.CreateModel(ctx, &beliefv1.CreateModelRequest{Model: msg})
		if err != nil {
			return rpcError(*server, err)
		}
		info := resp.GetInfo()
		if resp.GetCreated() {
			fmt.Fprintf(stdout, "stored %s version %d (%s…)\n", info.GetName(), info.GetVersion(), info.GetHash()[:12])
		} else {
			fmt.Fprintf(stdout, "unchanged: %s version %d already has this content (%s…)\n", info.GetName(), info.GetVersion(), info.GetHash()[:12])
		}
	case "get":
		resp, err := c.models.GetModel(ctx, &beliefv1.GetModelRequest{Name: rest[0]})
		if err != nil {
			return rpcError(*server, err)
		}
		return writeJSON(stdout, convert.ModelFromProto(resp.GetModel()))
	case "delete":
		if _, err := c.models.DeleteModel(ctx, &beliefv1.DeleteModelRequest{Name: rest[0]}); err != nil {
			return rpcError(*server, err)
		}
		fmt.Fprintf(stdout, "deleted %s (every version)\n", rest[0])
	default:
		resp, err := c.models.ListModels(ctx, &beliefv1.ListModelsRequest{PageSize: 1000})
		if err != nil {
			return rpcError(*server, err)
		}
		tw := tabwriter.NewWriter(stdout, 2, 4, 2, ' ', 0)
		fmt.Fprintln(tw, "name\tversion\tvariables\thash\tcreated")
		for _, m := range resp.GetModels() {
			fmt.Fprintf(tw, "%s\t%d\t%d\t%s…\t%s\n", m.GetName(), m.GetVersion(), m.GetVariables(), m.GetHash()[:12], m.GetCreatedAt().AsTime().Local().Format(time.DateTime))
		}
		return tw.Flush()
	}
	return nil
}
