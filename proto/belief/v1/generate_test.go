package beliefv1_test

import (
	"bytes"
	"os"
	"os/exec"
	"path/filepath"
	"regexp"
	"sort"
	"strings"
	"testing"
)

// versionLine matches the header lines where protoc-gen-go and
// protoc-gen-go-grpc record the tool versions; they are reported but not
// compared, so a developer with another protoc release is not told the code
// is stale when it is not.
var versionLine = regexp.MustCompile(`(?m)^// (\t|- )protoc.*\n`)

// tool finds an executable on PATH, in GOBIN or in GOPATH/bin.
func tool(name string) string {
	if p, err := exec.LookPath(name); err == nil {
		return p
	}
	var dirs []string
	if b := os.Getenv("GOBIN"); b != "" {
		dirs = append(dirs, b)
	}
	if out, err := exec.Command("go", "env", "GOBIN", "GOPATH").Output(); err == nil {
		for _, l := range strings.Split(strings.TrimSpace(string(out)), "\n") {
			for _, d := range filepath.SplitList(l) {
				if d = strings.TrimSpace(d); d != "" {
					dirs = append(dirs, d, filepath.Join(d, "bin"))
				}
			}
		}
	}
	for _, d := range dirs {
		p := filepath.Join(d, name)
		if st, err := os.Stat(p); err == nil && !st.IsDir() && st.Mode()&0o111 != 0 {
			return p
		}
	}
	return ""
}

// TestGeneratedCodeIsCurrent regenerates the Go code of the protos into a
// temporary directory, as proto/generate.sh does, and fails when the
// committed files differ.
func TestGeneratedCodeIsCurrent(t *testing.T) {
	protoc, genGo, genGRPC := tool("protoc"), tool("protoc-gen-go"), tool("protoc-gen-go-grpc")
	if protoc == "" || genGo == "" || genGRPC == "" {
		msg := "protoc, protoc-gen-go and protoc-gen-go-grpc are needed to check the generated code " +
			"(install protoc with your package manager, the plugins with: bash proto/generate.sh --install-tools)"
		if os.Getenv("CI") == "true" {
			t.Fatal(msg)
		}
		t.Skip(msg)
	}
	protoDir, err := filepath.Abs("../..")
	if err != nil {
		t.Fatal(err)
	}
	protos, err := filepath.Glob("*.proto")
	if err != nil || len(protos) == 0 {
		t.Fatalf("no .proto files found: %v", err)
	}
	args := []string{"-I", protoDir,
		"--plugin=protoc-gen-go=" + genGo, "--plugin=protoc-gen-go-grpc=" + genGRPC}
	out := t.TempDir()
	args = append(args, "--go_out="+out, "--go_opt=paths=source_relative",
		"--go-grpc_out="+out, "--go-grpc_opt=paths=source_relative")
	for _, p := range protos {
		args = append(args, filepath.Join("belief/v1", p))
	}
	cmd := exec.Command(protoc, args...)
	cmd.Dir = protoDir
	if msg, err := cmd.CombinedOutput(); err != nil {
		t.Fatalf("protoc: %v\n%s", err, msg)
	}

	fresh, err := filepath.Glob(filepath.Join(out, "belief/v1/*.go"))
	if err != nil || len(fresh) == 0 {
		t.Fatalf("protoc generated nothing: %v", err)
	}
	want := map[string]bool{}
	for _, f := range fresh {
		name := filepath.Base(f)
		want[name] = true
		got, err := os.ReadFile(name)
		if err != nil {
			t.Errorf("%s is missing: run bash proto/generate.sh", name)
			continue
		}
		gen, err := os.ReadFile(f)
		if err != nil {
			t.Fatal(err)
		}
		if !bytes.Equal(versionLine.ReplaceAll(got, nil), versionLine.ReplaceAll(gen, nil)) {
			t.Errorf("%s is stale: run bash proto/generate.sh (regenerated with %s; committed with %s)",
				name, versions(gen), versions(got))
		}
	}
	committed, _ := filepath.Glob("*.pb.go")
	sort.Strings(committed)
	for _, c := range committed {
		if !want[c] {
			t.Errorf("%s has no .proto any more: delete it", c)
		}
	}
}

func versions(src []byte) string {
	var vs []string
	for _, m := range versionLine.FindAll(src, -1) {
		vs = append(vs, strings.Join(strings.Fields(strings.TrimPrefix(strings.TrimPrefix(string(m), "// \t"), "// - ")), " "))
	}
	if len(vs) == 0 {
		return "unknown versions"
	}
	return strings.Join(vs, ", ")
}
