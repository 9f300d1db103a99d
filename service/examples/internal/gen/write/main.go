// Command write regenerates the generated example models of package
// examples into the current directory (go generate runs it there):
//
//	go generate ./service/examples
package main

import (
	"fmt"
	"os"
	"path/filepath"

	"github.com/beliefd/beliefd/service/examples/internal/gen"
)

func main() {
	data, err := gen.Regions()
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		os.Exit(1)
	}
	path := filepath.Join(".", gen.RegionsName+".json")
	if err := os.WriteFile(path, data, 0o644); err != nil {
		fmt.Fprintf(os.Stderr, "write %s: %v\n", path, err)
		os.Exit(1)
	}
	fmt.Printf("wrote %s (%d bytes)\n", path, len(data))
}
