package alerts

// Defaults is the default rule set. Each threshold's source is in Source
// and in the comment beside it; configs/breathd.example.yaml repeats them.
// Every rule can be changed or switched off per device.
func Defaults() []Rule {
	return []Rule{
		// plateau pressure ≤ 30 cmH2O: ARDS Network, NEJM 2000;342:1301
		{ID: "plateau_high", Field: "pplat", Compare: Above, Threshold: 30, Hysteresis: 1,
			RaiseAfter: 3, ClearAfter: 3, Level: LevelWarning, Source: "ARDS Network, NEJM 2000;342:1301"},
		// tidal volume 6 mL/kg PBW target, 8 the top of the range: ARDS Network 2000
		{ID: "tidal_volume_high", Field: "vt_pbw", Compare: Above, Threshold: 8, Hysteresis: 0.3,
			RaiseAfter: 5, ClearAfter: 5, Level: LevelWarning, Source: "ARDS Network, NEJM 2000;342:1301"},
		// driving pressure 15 cmH2O: Amato et al., NEJM 2015;372:747; Aoyama et al., Crit Care Med 2018;46:300
		{ID: "driving_pressure_high", Field: "dp", Compare: Above, Threshold: 15, Hysteresis: 1,
			RaiseAfter: 3, ClearAfter: 3, Level: LevelWarning, Source: "Amato, NEJM 2015;372:747; Aoyama, Crit Care Med 2018;46:300"},
		// mechanical power 17 J/min: Serpa Neto et al., Intensive Care Med 2018
		{ID: "power_high", Field: "mp", Compare: Above, Threshold: 17, Hysteresis: 1,
			RaiseAfter: 5, ClearAfter: 5, Level: LevelNotice, Source: "Serpa Neto, Intensive Care Med 2018"},
		// stress index outside 0.90–1.10: Ranieri et al., Anesthesiology 2000;93:1320 (on the window median: one breath's index is noisy)
		{ID: "stress_index_out", Field: "median.si", Compare: Outside, Low: 0.9, High: 1.1, Hysteresis: 0.02,
			RaiseAfter: 5, ClearAfter: 5, Level: LevelNotice, Source: "Ranieri, Anesthesiology 2000;93:1320"},
		// peak − plateau normally under 10 cmH2O: physiology teaching (common practice, no source)
		{ID: "peak_plateau_gap_high", Field: "peak_plateau_gap", Compare: Above, Threshold: 10, Hysteresis: 1,
			RaiseAfter: 3, ClearAfter: 3, Level: LevelWarning, Source: "common practice, no source"},
		// expiratory flow not back to zero: intrinsic PEEP present (Pepe & Marini, Am Rev Respir Dis 1982;126:166)
		{ID: "incomplete_exhalation", Field: "eef", Compare: Below, Threshold: -5, Hysteresis: 2,
			RaiseAfter: 5, ClearAfter: 5, Level: LevelNotice, Source: "Pepe & Marini, Am Rev Respir Dis 1982;126:166"},
		// leak over 20 %: common practice, no source
		{ID: "leak_high", Field: "leak", Compare: Above, Threshold: 20, Hysteresis: 3,
			RaiseAfter: 5, ClearAfter: 5, Level: LevelNotice, Source: "common practice, no source"},
		// compliance 20 % under the baseline window's: our choice (common practice, no source)
		{ID: "compliance_falling", Field: "compliance_change", Compare: Below, Threshold: -20, Hysteresis: 3,
			RaiseAfter: 5, ClearAfter: 5, Level: LevelNotice, Source: "common practice, no source"},
		// the resistive part of the peak pressure up 5 cmH2O against the baseline (DESIGN §4 attribution)
		{ID: "resistance_rising", Field: "rise.resistive", Compare: Above, Threshold: 5, Hysteresis: 1,
			RaiseAfter: 5, ClearAfter: 5, Level: LevelNotice, Source: "common practice, no source"},
		// asynchrony index over the window above 10 % (the boundary itself
		// does not raise: "> 10 %"), held for 20 breaths: Thille et al.,
		// Intensive Care Med 2006;32:1515; Blanch et al., Intensive Care
		// Med 2015;41:633 (an index above 10 % went with higher mortality)
		{ID: "asynchrony_high", Field: "asynchrony_index", Compare: Above, Threshold: 10, Hysteresis: 2,
			RaiseAfter: 20, ClearAfter: 20, Level: LevelNotice, Source: "Thille, Intensive Care Med 2006;32:1515; Blanch, Intensive Care Med 2015;41:633"},

		// technical conditions, evaluated every second
		{ID: "no_samples", Field: "no_samples", Compare: Above, Threshold: 10, RaiseAfter: 1, ClearAfter: 1,
			Level: LevelUrgent, Source: "technical"},
		{ID: "no_breaths", Field: "no_breaths", Compare: Above, Threshold: 30, RaiseAfter: 1, ClearAfter: 1,
			Level: LevelUrgent, Source: "technical"},
		{ID: "circuit_open", Field: "circuit_open", Compare: Above, Threshold: 0.5, RaiseAfter: 1, RaiseAfterSec: 4,
			ClearAfter: 3, Level: LevelUrgent, Source: "technical"},
		{ID: "bad_lines", Field: "bad_lines", Compare: Above, Threshold: 60, RaiseAfter: 5, ClearAfter: 30,
			Level: LevelWarning, Source: "technical"},
		{ID: "sample_rate_off", Field: "sample_rate_off", Compare: Above, Threshold: 5, Hysteresis: 1, RaiseAfter: 30, ClearAfter: 10,
			Level: LevelWarning, Source: "technical"},
		{ID: "port_lost", Field: "port_lost", Compare: Above, Threshold: 0.5, RaiseAfter: 2, ClearAfter: 1,
			Level: LevelUrgent, Source: "technical"},
		{ID: "format_suspect", Field: "format_suspect", Compare: Above, Threshold: 0.5, RaiseAfter: 1, ClearAfter: 1,
			Level: LevelWarning, Source: "technical: the numbers look like a format read wrongly; the status says which flag fixes it"},
	}
}
