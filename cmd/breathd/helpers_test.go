package main

import "strconv"

func appendF(b []byte, v float64) []byte { return strconv.AppendFloat(b, v, 'f', 4, 64) }

// appendLine appends one t,paw,flow line.
func appendLine(b []byte, t float64) []byte {
	b = strconv.AppendFloat(b, t, 'f', 2, 64)
	b = append(b, ",5.0,0.0\n"...)
	return b
}

func parseF(s string) float64 {
	v, _ := strconv.ParseFloat(s, 64)
	return v
}
