package flags

import "fmt"

// Bounds of the typing measures a respondent page may report for one
// reply. They are far above anything a person produces (a reply holds at
// most 20,000 characters), so only a broken or hostile client meets them.
const (
	MaxTypingMS    = 24 * 60 * 60 * 1000 // one day
	MaxKeystrokes  = 1_000_000
	MaxPastes      = 10_000
	MaxHiddenCount = 10_000
)

// Typing is how a respondent wrote one reply, as the respondent page
// measured it. The JSON names are those of the reply API and of the turns
// table's columns.
type Typing struct {
	// TypingMS is the time from the first change of the reply box (a key,
	// a paste or a drop) to sending, in milliseconds.
	TypingMS int64 `json:"typing_ms"`
	// Keystrokes counts changes typed into the box: one per key press; a
	// word swiped or picked from suggestions on a phone counts once.
	Keystrokes int64 `json:"keystrokes"`
	// Pastes counts paste and drop events into the box.
	Pastes int64 `json:"pastes"`
	// HiddenCount counts the times the page was hidden (another tab or app
	// in front) since the previous reply was sent or the page opened.
	HiddenCount int64 `json:"hidden_count"`
}

// FieldError names the field of a bad typing measure.
type FieldError struct {
	Field string // as in the reply API, e.g. typing.pastes
	Msg   string
}

func (e *FieldError) Error() string { return e.Field + ": " + e.Msg }

// Check reports the first measure that is negative or over its bound, as
// a *FieldError.
func (t Typing) Check() error {
	for _, m := range []struct {
		name   string
		v, max int64
	}{
		{"typing_ms", t.TypingMS, MaxTypingMS},
		{"keystrokes", t.Keystrokes, MaxKeystrokes},
		{"pastes", t.Pastes, MaxPastes},
		{"hidden_count", t.HiddenCount, MaxHiddenCount},
	} {
		if m.v < 0 || m.v > m.max {
			return &FieldError{Field: "typing." + m.name, Msg: fmt.Sprintf("must be a whole number from 0 to %d (got %d)", m.max, m.v)}
		}
	}
	return nil
}
