// Package examples holds the example models shipped with beliefd. They are
// set in an invented scenario (Tarnwick Freight, a fictional parcel carrier)
// with made-up numbers, for demonstration only.
package examples

import (
	"bytes"
	"embed"
	"fmt"
	"io/fs"
	"sort"
	"strings"

	"github.com/beliefd/beliefd/service/model"
)

//go:embed *.json
var files embed.FS

// Names lists the example models by name.
func Names() []string {
	entries, _ := fs.ReadDir(files, ".")
	var names []string
	for _, e := range entries {
		names = append(names, strings.TrimSuffix(e.Name(), ".json"))
	}
	sort.Strings(names)
	return names
}

// Raw returns the JSON document of the named example.
func Raw(name string) ([]byte, error) {
	data, err := files.ReadFile(name + ".json")
	if err != nil {
		return nil, fmt.Errorf("example %q: no such example (have: %s)", name, strings.Join(Names(), ", "))
	}
	return data, nil
}

// Load decodes and compiles the named example.
func Load(name string) (*model.Document, *model.Network, error) {
	data, err := Raw(name)
	if err != nil {
		return nil, nil, err
	}
	doc, err := model.Decode(bytes.NewReader(data), 0)
	if err != nil {
		return nil, nil, fmt.Errorf("example %q: %w", name, err)
	}
	net, err := model.Compile(doc, model.Limits{})
	if err != nil {
		return nil, nil, fmt.Errorf("example %q: %w", name, err)
	}
	return doc, net, nil
}
