package mechanics

import (
	"fmt"
	"math"
	"strings"
)

// Patient is what predicted body weight needs.
type Patient struct {
	Sex      string  `yaml:"sex"`       // male or female
	HeightCm float64 `yaml:"height_cm"` // cm
}

// PredictedBodyWeight returns the ARDS Network predicted body weight in kg
// for sex "male" or "female" and height in cm:
// male 50 + 0.91·(height − 152.4), female 45.5 + 0.91·(height − 152.4)
// (ARDS Network, NEJM 2000;342:1301, in its centimetre form).
func PredictedBodyWeight(sex string, heightCm float64) (float64, error) {
	if math.IsNaN(heightCm) || heightCm < 100 || heightCm > 250 {
		return 0, fmt.Errorf("height %g cm out of range (100…250)", heightCm)
	}
	switch strings.ToLower(sex) {
	case "male", "m":
		return 50 + 0.91*(heightCm-152.4), nil
	case "female", "f":
		return 45.5 + 0.91*(heightCm-152.4), nil
	}
	return 0, fmt.Errorf("sex %q: want male or female", sex)
}
