package convert

import (
	"fmt"
	"strings"
	"time"

	beliefv1 "github.com/beliefd/beliefd/proto/belief/v1"
	"github.com/beliefd/beliefd/service/jobs"
	"github.com/beliefd/beliefd/service/model"
	"google.golang.org/protobuf/types/known/timestamppb"
)

// ModelToProto converts a model document to its message. A variable with
// more than one distribution has no message form: the error names it.
func ModelToProto(doc *model.Document) (*beliefv1.Model, error) {
	if doc == nil {
		return nil, nil
	}
	m := &beliefv1.Model{Name: doc.Name, Description: doc.Description}
	if len(doc.Variables) > 0 {
		m.Variables = make([]*beliefv1.Variable, len(doc.Variables))
	}
	for i := range doc.Variables {
		v, err := variableToProto(&doc.Variables[i])
		if err != nil {
			return nil, fmt.Errorf("convert model: %w", err)
		}
		m.Variables[i] = v
	}
	return m, nil
}

func variableToProto(v *model.Variable) (*beliefv1.Variable, error) {
	out := &beliefv1.Variable{
		Name:        v.Name,
		Description: v.Description,
		States:      nilIfEmpty(v.States),
		Parents:     nilIfEmpty(v.Parents),
		FaultStates: nilIfEmpty(v.FaultStates),
	}
	var kinds []string
	if v.Table != nil {
		kinds = append(kinds, "table")
		t := &beliefv1.Table{Rows: make([]*beliefv1.Row, len(v.Table))}
		for i, r := range v.Table {
			t.Rows[i] = &beliefv1.Row{P: nilIfEmpty(r)}
		}
		out.Distribution = &beliefv1.Variable_Table{Table: t}
	}
	if v.Rows != nil {
		kinds = append(kinds, "rows")
		rs := &beliefv1.KeyedRows{Rows: make([]*beliefv1.KeyedRow, len(v.Rows))}
		for i, r := range v.Rows {
			rs.Rows[i] = &beliefv1.KeyedRow{Given: copyMap(r.Given, false), P: nilIfEmpty(r.P)}
		}
		out.Distribution = &beliefv1.Variable_Rows{Rows: rs}
	}
	if v.NoisyOR != nil {
		kinds = append(kinds, "noisy_or")
		out.Distribution = &beliefv1.Variable_NoisyOr{NoisyOr: &beliefv1.NoisyOr{Leak: v.NoisyOR.Leak, Links: copyMap(v.NoisyOR.Links, false)}}
	}
	if v.NoisyMAX != nil {
		kinds = append(kinds, "noisy_max")
		nm := &beliefv1.NoisyMax{Leak: nilIfEmpty(v.NoisyMAX.Leak)}
		if len(v.NoisyMAX.Links) > 0 {
			nm.Links = make(map[string]*beliefv1.NoisyMaxLinks, len(v.NoisyMAX.Links))
		}
		for parent, byState := range v.NoisyMAX.Links {
			l := &beliefv1.NoisyMaxLinks{}
			if len(byState) > 0 {
				l.States = make(map[string]*beliefv1.Row, len(byState))
			}
			for s, p := range byState {
				l.States[s] = &beliefv1.Row{P: nilIfEmpty(p)}
			}
			nm.Links[parent] = l
		}
		out.Distribution = &beliefv1.Variable_NoisyMax{NoisyMax: nm}
	}
	if v.Gate != nil {
		kinds = append(kinds, "gate")
		out.Distribution = &beliefv1.Variable_Gate{Gate: &beliefv1.Gate{Type: v.Gate.Type, K: int64(v.Gate.K)}}
	}
	if v.FailureRate != nil {
		kinds = append(kinds, "failure_rate")
		out.Distribution = &beliefv1.Variable_FailureRate{FailureRate: &beliefv1.FailureRate{Lambda: v.FailureRate.Lambda, MissionTime: v.FailureRate.MissionTime}}
	}
	if len(kinds) > 1 {
		return nil, fmt.Errorf("%w: variable %q has more than one distribution (%s)", ErrUnrepresentable, v.Name, strings.Join(kinds, ", "))
	}
	return out, nil
}

// ModelFromProto converts a model message to its document.
func ModelFromProto(m *beliefv1.Model) *model.Document {
	if m == nil {
		return nil
	}
	doc := &model.Document{Name: m.GetName(), Description: m.GetDescription()}
	// "variables" is always written, so an empty list stays a list.
	doc.Variables = make([]model.Variable, len(m.GetVariables()))
	for i, v := range m.GetVariables() {
		doc.Variables[i] = variableFromProto(v)
	}
	return doc
}

func variableFromProto(v *beliefv1.Variable) model.Variable {
	out := model.Variable{
		Name:        v.GetName(),
		Description: v.GetDescription(),
		States:      nonNil(v.GetStates()), // "states" is always written
		Parents:     nilIfEmpty(v.GetParents()),
		FaultStates: nilIfEmpty(v.GetFaultStates()),
	}
	switch d := v.GetDistribution().(type) {
	case *beliefv1.Variable_Table:
		out.Table = make([][]float64, len(d.Table.GetRows()))
		for i, r := range d.Table.GetRows() {
			out.Table[i] = nonNil(r.GetP())
		}
	case *beliefv1.Variable_Rows:
		out.Rows = make([]model.KeyedRow, len(d.Rows.GetRows()))
		for i, r := range d.Rows.GetRows() {
			out.Rows[i] = model.KeyedRow{Given: copyMap(r.GetGiven(), true), P: nonNil(r.GetP())}
		}
	case *beliefv1.Variable_NoisyOr:
		out.NoisyOR = &model.NoisyOR{Leak: d.NoisyOr.GetLeak(), Links: copyMap(d.NoisyOr.GetLinks(), true)}
	case *beliefv1.Variable_NoisyMax:
		nm := &model.NoisyMAX{Leak: nonNil(d.NoisyMax.GetLeak()), Links: make(map[string]map[string][]float64, len(d.NoisyMax.GetLinks()))}
		for parent, l := range d.NoisyMax.GetLinks() {
			byState := make(map[string][]float64, len(l.GetStates()))
			for s, r := range l.GetStates() {
				byState[s] = nonNil(r.GetP())
			}
			nm.Links[parent] = byState
		}
		out.NoisyMAX = nm
	case *beliefv1.Variable_Gate:
		out.Gate = &model.Gate{Type: d.Gate.GetType(), K: int(d.Gate.GetK())}
	case *beliefv1.Variable_FailureRate:
		out.FailureRate = &model.FailureRate{Lambda: d.FailureRate.GetLambda(), MissionTime: d.FailureRate.GetMissionTime()}
	}
	return out
}

// ModelInfoToProto converts a stored model's description.
func ModelInfoToProto(info jobs.ModelInfo) *beliefv1.ModelInfo {
	return &beliefv1.ModelInfo{
		Name:      info.Name,
		Version:   int64(info.Version),
		Hash:      info.Hash,
		Variables: int64(info.Variables),
		Bytes:     int64(info.Bytes),
		CreatedAt: timeToProto(info.CreatedAt),
	}
}

// ModelInfoFromProto converts a stored model's description back.
func ModelInfoFromProto(m *beliefv1.ModelInfo) jobs.ModelInfo {
	return jobs.ModelInfo{
		Name:      m.GetName(),
		Version:   int(m.GetVersion()),
		Hash:      m.GetHash(),
		Variables: int(m.GetVariables()),
		Bytes:     int(m.GetBytes()),
		CreatedAt: timeFromProto(m.GetCreatedAt()),
	}
}

// timeToProto maps the zero time to an absent timestamp.
func timeToProto(t time.Time) *timestamppb.Timestamp {
	if t.IsZero() {
		return nil
	}
	return timestamppb.New(t)
}

// timeFromProto maps an absent timestamp to the zero time; others come back in UTC.
func timeFromProto(ts *timestamppb.Timestamp) time.Time {
	if ts == nil {
		return time.Time{}
	}
	return ts.AsTime()
}
