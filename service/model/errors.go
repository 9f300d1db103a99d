package model

import (
	"errors"
	"fmt"
	"strings"
	"unicode/utf8"
)

// ErrInvalid is wrapped by every validation error, so callers can branch
// with errors.Is(err, model.ErrInvalid).
var ErrInvalid = errors.New("invalid model")

// ErrTooLarge is wrapped (together with ErrInvalid) when a model exceeds a
// configured limit.
var ErrTooLarge = errors.New("model exceeds a limit")

// Problem is one thing wrong with one variable (or with the whole model
// when Variable is empty).
type Problem struct {
	Variable string // the variable at fault, "" for the model as a whole
	Field    string // the document field at fault, such as "table" or "parents"
	Message  string
	tooLarge bool
}

func (p Problem) String() string {
	var b strings.Builder
	if p.Variable != "" {
		fmt.Fprintf(&b, "variable %q", p.Variable)
		if p.Field != "" {
			fmt.Fprintf(&b, " (%s)", p.Field)
		}
		b.WriteString(": ")
	} else if p.Field != "" {
		fmt.Fprintf(&b, "%s: ", p.Field)
	}
	b.WriteString(p.Message)
	return b.String()
}

// ValidationError lists everything found wrong with a model document.
type ValidationError struct {
	Problems []Problem
}

func (e *ValidationError) Error() string {
	if len(e.Problems) == 1 {
		return "invalid model: " + e.Problems[0].String()
	}
	var b strings.Builder
	fmt.Fprintf(&b, "invalid model: %d problems:", len(e.Problems))
	for _, p := range e.Problems {
		b.WriteString("\n  - ")
		b.WriteString(p.String())
	}
	return b.String()
}

// Unwrap lets errors.Is find ErrInvalid, and ErrTooLarge when a limit was hit.
func (e *ValidationError) Unwrap() []error {
	errs := []error{ErrInvalid}
	for _, p := range e.Problems {
		if p.tooLarge {
			errs = append(errs, ErrTooLarge)
			break
		}
	}
	return errs
}

// maxProblems bounds how many problems one error reports.
const maxProblems = 25

type problems struct {
	list []Problem
}

func (ps *problems) add(variable, field, format string, args ...any) {
	if len(ps.list) < maxProblems {
		ps.list = append(ps.list, Problem{Variable: echo(variable), Field: field, Message: fmt.Sprintf(format, echoArgs(args)...)})
	}
}

func (ps *problems) addLimit(variable, field, format string, args ...any) {
	if len(ps.list) < maxProblems {
		ps.list = append(ps.list, Problem{Variable: echo(variable), Field: field, Message: fmt.Sprintf(format, echoArgs(args)...), tooLarge: true})
	}
}

// maxEcho bounds how much of a name from the document a problem repeats,
// so that an error stays small however long the names (25 problems each
// quoting a name of megabytes would otherwise make an error of tens of
// megabytes from one request).
const maxEcho = 512

// echo returns s, or its first maxEcho bytes (on a character boundary)
// with its length when it is longer.
func echo(s string) string {
	if len(s) <= maxEcho {
		return s
	}
	cut := maxEcho
	for cut > 0 && !utf8.RuneStart(s[cut]) {
		cut--
	}
	return fmt.Sprintf("%s…(%d bytes)", s[:cut], len(s))
}

// echoArgs shortens the long strings among format arguments.
func echoArgs(args []any) []any {
	for i, a := range args {
		if s, ok := a.(string); ok && len(s) > maxEcho {
			args[i] = echo(s)
		}
	}
	return args
}

func (ps *problems) err() error {
	if len(ps.list) == 0 {
		return nil
	}
	return &ValidationError{Problems: ps.list}
}
