package daemon

// UsageError marks an error caused by bad usage or bad configuration; the command
// line exits with its usage code for it.
type UsageError struct{ Err error }

func (e *UsageError) Error() string { return e.Err.Error() }
func (e *UsageError) Unwrap() error { return e.Err }
