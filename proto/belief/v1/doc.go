// Package beliefv1 holds the Go code generated from the protos of beliefd's
// gRPC API (package belief.v1): typed forms of the model, query and result
// documents, jobs, and the ModelService, JobService, QueryService and
// StandingQueryService (standing.proto).
//
// The *.pb.go files are generated: change the .proto files and run
// proto/generate.sh. generate_test.go fails when they are stale.
// Package api/convert converts these messages to and from the JSON documents.
package beliefv1
