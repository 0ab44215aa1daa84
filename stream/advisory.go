package stream

// Advisory is the notice carried by the README, --help and the status
// payload.
const Advisory = "breathd is advisory research software: not a medical device, not a certified alarm system, " +
	"and not for clinical decisions. Local regulations, the institution's review board and licensed clinicians " +
	"decide how it may be used."
