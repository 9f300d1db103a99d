#!/usr/bin/env bash
# Regenerates the Go code of the protos in proto/belief/v1. Run from anywhere:
#
#   bash proto/generate.sh                # regenerate (protoc and the plugins on PATH)
#   bash proto/generate.sh --install-tools  # only install the pinned plugins (for CI)
#
# Needs protoc (3.21 or later; Debian: apt-get install protobuf-compiler).
# protoc-gen-go is pinned to the google.golang.org/protobuf version in go.mod
# so generated code matches the runtime; protoc-gen-go-grpc to the version
# below. proto/belief/v1/generate_test.go fails when the committed code differs
# from what this script produces.
set -euo pipefail

PROTOC_GEN_GO_GRPC_VERSION=v1.6.2

root="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
cd "$root"

if [[ "${1:-}" == "--install-tools" ]]; then
	go install "google.golang.org/protobuf/cmd/protoc-gen-go@$(go list -m -f '{{.Version}}' google.golang.org/protobuf)"
	go install "google.golang.org/grpc/cmd/protoc-gen-go-grpc@${PROTOC_GEN_GO_GRPC_VERSION}"
	exit 0
fi

export PATH="$(go env GOPATH)/bin:$PATH"
gobin="$(go env GOBIN)"
if [[ -n "$gobin" ]]; then
	export PATH="$gobin:$PATH"
fi

for tool in protoc protoc-gen-go protoc-gen-go-grpc; do
	if ! command -v "$tool" >/dev/null; then
		echo "generate.sh: $tool not found (run with --install-tools for the plugins; protoc comes from your package manager)" >&2
		exit 1
	fi
done

protoc -I proto \
	--go_out=proto --go_opt=paths=source_relative \
	--go-grpc_out=proto --go-grpc_opt=paths=source_relative \
	proto/belief/v1/*.proto
