package stream

import (
	"encoding/json"
	"math"
	"time"

	"breathd/alerts"
)

// PayloadVersion is the "v" of every JSON payload.
const PayloadVersion = 1

// num is a number that encodes NaN and ±Inf as null.
type num float64

// MarshalJSON encodes the number, or null when it is not finite.
func (n num) MarshalJSON() ([]byte, error) {
	f := float64(n)
	if math.IsNaN(f) || math.IsInf(f, 0) {
		return []byte("null"), nil
	}
	return json.Marshal(math.Round(f*1e4) / 1e4)
}

// eventPayload is an event transition as published and as written by
// analyze --events.
type eventPayload struct {
	V          int    `json:"v"`
	ID         string `json:"id"`
	Seq        int64  `json:"seq"`
	Device     string `json:"device"`
	Rule       string `json:"rule"`
	Transition string `json:"transition"`
	Level      string `json:"level"`
	Field      string `json:"field"`
	Value      num    `json:"value"`
	Threshold  num    `json:"threshold"`
	Low        num    `json:"low"`
	High       num    `json:"high"`
	Latching   bool   `json:"latching"`
	T          num    `json:"t"`
	At         string `json:"at"`
}

// EventJSON encodes an event as its JSON payload (one line, no newline).
func EventJSON(ev *alerts.Event) []byte {
	p := eventPayload{V: PayloadVersion, ID: ev.ID, Seq: ev.Seq, Device: ev.Device, Rule: ev.Rule,
		Transition: ev.Transition, Level: ev.Level, Field: ev.Field, Value: num(ev.Value),
		Threshold: num(ev.Threshold), Low: num(ev.Low), High: num(ev.High), Latching: ev.Latching,
		T: num(ev.T), At: ev.At.UTC().Format(time.RFC3339Nano)}
	b, _ := json.Marshal(p)
	return b
}
