package model

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
)

// Document is the JSON model document (see the package comment).
type Document struct {
	Name        string     `json:"name"`
	Description string     `json:"description,omitempty"`
	Variables   []Variable `json:"variables"`
}

// Variable is one variable of a model document.
type Variable struct {
	Name        string       `json:"name"`
	Description string       `json:"description,omitempty"`
	States      []string     `json:"states"`
	Parents     []string     `json:"parents,omitempty"`
	FaultStates []string     `json:"fault_states,omitempty"`
	Table       [][]float64  `json:"table,omitempty"`
	Rows        []KeyedRow   `json:"rows,omitempty"`
	NoisyOR     *NoisyOR     `json:"noisy_or,omitempty"`
	NoisyMAX    *NoisyMAX    `json:"noisy_max,omitempty"`
	Gate        *Gate        `json:"gate,omitempty"`
	FailureRate *FailureRate `json:"failure_rate,omitempty"`
}

// KeyedRow is one table row addressed by the parents' states.
type KeyedRow struct {
	Given map[string]string `json:"given"`
	P     []float64         `json:"p"`
}

// NoisyOR is a noisy-OR distribution with a leak (Díez parameterisation).
type NoisyOR struct {
	Leak  float64            `json:"leak"`
	Links map[string]float64 `json:"links"`
}

// NoisyMAX is the multi-state generalisation of NoisyOR.
type NoisyMAX struct {
	Leak  []float64                       `json:"leak"`
	Links map[string]map[string][]float64 `json:"links"`
}

// Gate is deterministic fault-tree logic.
type Gate struct {
	Type string `json:"type"`
	K    int    `json:"k,omitempty"`
}

// Gate types.
const (
	GateAnyOf = "any_of"
	GateAllOf = "all_of"
	GateKOfN  = "k_of_n"
)

// FailureRate is a root event with a constant failure rate over a mission time.
type FailureRate struct {
	Lambda      float64 `json:"lambda"`
	MissionTime float64 `json:"mission_time"`
}

// DefaultMaxDocumentBytes bounds the size of a model document read by Decode.
const DefaultMaxDocumentBytes = 64 << 20

// ErrMalformed is wrapped by every error that comes from reading a document
// that is not well-formed JSON of the expected shape.
var ErrMalformed = errors.New("malformed model document")

// Decode reads one JSON model document of at most maxBytes bytes
// (DefaultMaxDocumentBytes when maxBytes <= 0). Unknown fields and trailing
// data are errors. The document is not validated: call Compile for that.
func Decode(r io.Reader, maxBytes int64) (*Document, error) {
	if maxBytes <= 0 {
		maxBytes = DefaultMaxDocumentBytes
	}
	data, err := io.ReadAll(io.LimitReader(r, maxBytes+1))
	if err != nil {
		return nil, fmt.Errorf("read model: %w", err)
	}
	if int64(len(data)) > maxBytes {
		return nil, fmt.Errorf("%w: document larger than %d bytes", ErrMalformed, maxBytes)
	}
	return DecodeBytes(data)
}

// DecodeBytes is Decode for a document already in memory.
func DecodeBytes(data []byte) (*Document, error) {
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.DisallowUnknownFields()
	var doc Document
	if err := dec.Decode(&doc); err != nil {
		return nil, fmt.Errorf("%w: %s", ErrMalformed, describeJSONError(data, err))
	}
	if dec.More() {
		return nil, fmt.Errorf("%w: unexpected data after the document at %s", ErrMalformed, position(data, dec.InputOffset()))
	}
	return &doc, nil
}

func describeJSONError(data []byte, err error) string {
	var syn *json.SyntaxError
	var typ *json.UnmarshalTypeError
	switch {
	case errors.As(err, &syn):
		return fmt.Sprintf("%v at %s", syn, position(data, syn.Offset))
	case errors.As(err, &typ):
		field := typ.Field
		if field == "" {
			field = "document"
		}
		return fmt.Sprintf("field %q: expected %s, found JSON %s at %s", field, typ.Type, typ.Value, position(data, typ.Offset))
	case errors.Is(err, io.EOF):
		return "empty document"
	case errors.Is(err, io.ErrUnexpectedEOF):
		return "document ends early (unbalanced braces or brackets?)"
	}
	return err.Error()
}

func position(data []byte, off int64) string {
	if off > int64(len(data)) {
		off = int64(len(data))
	}
	line, col := 1, 1
	for _, b := range data[:off] {
		if b == '\n' {
			line++
			col = 1
		} else {
			col++
		}
	}
	return fmt.Sprintf("line %d, column %d", line, col)
}
