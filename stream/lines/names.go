package lines

import (
	"regexp"
	"strings"
)

// The names a header may give a column, besides breathd's own, and the
// ways devices and spreadsheets write units. Case and blanks do not
// matter.
var (
	columnAliases = map[string]string{
		"t": ColT, "time": ColT, "timestamp": ColT, "elapsed": ColT,
		"paw": ColPaw, "p": ColPaw, "pressure": ColPaw, "airway pressure": ColPaw, "airway_pressure": ColPaw, "pao": ColPaw,
		"flow": ColFlow, "airflow": ColFlow, "v'": ColFlow, "vdot": ColFlow,
		"vol": ColVol, "volume": ColVol,
	}
	unitAliases = map[string]string{
		"s": "s", "sec": "s", "ms": "ms", "msec": "ms",
		"cmh2o": "cmH2O", "cmh20": "cmH2O", "cm h2o": "cmH2O", "mbar": "mbar", "hpa": "hPa", "kpa": "kPa",
		"l/min": "L/min", "lpm": "L/min", "l/m": "L/min", "l/s": "L/s", "lps": "L/s", "ml/s": "mL/s",
		"ml": "mL", "l": "L",
	}
	// "Paw [mbar]", "Flow (L/s)", "Time {ms}"
	reBracketUnit = regexp.MustCompile(`^(.*?)\s*[\[({]\s*([^\])}]*?)\s*[\])}]$`)
)

// columnOf reads a header field as a column and, when the field carries
// one, its unit: "Paw [mbar]" is paw in mbar, "flow_lpm" flow in L/min,
// "time_ms" t in ms. col is "" for a column breathd does not read; unit
// is "" when none is given or the unit is not one of the column's.
func columnOf(field string) (col, unit string) {
	name := strings.ToLower(strings.TrimSpace(field))
	if c, ok := columnAliases[name]; ok {
		return c, ""
	}
	base, u := name, ""
	if m := reBracketUnit.FindStringSubmatch(name); m != nil {
		base, u = m[1], m[2]
	} else if i := strings.LastIndexAny(name, "_ "); i > 0 {
		base, u = strings.TrimSpace(name[:i]), strings.TrimSpace(name[i+1:])
	}
	c, ok := columnAliases[base]
	if !ok {
		return "", ""
	}
	if canon, ok := unitAliases[u]; ok {
		if _, err := UnitFactor(c, canon); err == nil {
			return c, canon
		}
	}
	if u != "" && !ok {
		return "", ""
	}
	return c, ""
}
