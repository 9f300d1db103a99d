package main

import (
	"context"
	"fmt"
	"io"

	"github.com/beliefd/beliefd/service/examples"
	"github.com/beliefd/beliefd/service/model"
)

func cmdExample(_ context.Context, args []string, stdout, _ io.Writer) error {
	fs := newFlagSet("example", "example [NAME]", stdout)
	if err := parseFlags(fs, args); err != nil {
		return err
	}
	switch fs.NArg() {
	case 0:
		for _, name := range examples.Names() {
			doc, net, err := examples.Load(name)
			if err != nil {
				return err
			}
			fmt.Fprintf(stdout, "%s  (%d variables)\n    %s\n", name, len(net.Vars), doc.Description)
		}
		fmt.Fprintln(stdout, "\nprint one with 'beliefd example NAME > model.json', or query it with 'beliefd run --example NAME'")
		return nil
	case 1:
		data, err := examples.Raw(fs.Arg(0))
		if err != nil {
			return fmt.Errorf("%w: %v", errUsage, err)
		}
		_, err = stdout.Write(data)
		return err
	}
	return fmt.Errorf("%w: give at most one example name", errUsage)
}

func loadExample(name string) (*model.Document, *model.Network, error) {
	doc, net, err := examples.Load(name)
	if err != nil {
		return nil, nil, fmt.Errorf("%w: %v", errUsage, err)
	}
	return doc, net, nil
}
