package analyze

// unreliableFlags are the flags after which a breath's mechanics must not
// enter trends or medians.
var unreliableFlags = [...]string{FlagEffort, FlagArtifact, FlagShort, FlagFitSingular, FlagFitImplausible, FlagFlowReversed, FlagLeak}

// Reliable reports whether the breath's mechanics are trend-worthy: a
// passive, complete breath whose equation-of-motion fit holds. Detectors and
// medians over a recording use only reliable breaths.
func (b *Breath) Reliable() bool {
	for _, f := range unreliableFlags {
		if b.HasFlag(f) {
			return false
		}
	}
	return true
}
