package store

import "regexp"

// Patterns of personal details masked in release copies. They are
// deliberately broad: a release copy errs on the side of masking.
var maskPatterns = []struct {
	re   *regexp.Regexp
	with string
}{
	{regexp.MustCompile(`(?i)[a-z0-9._%+-]+@[a-z0-9.-]+\.[a-z]{2,}`), "[email]"},
	{regexp.MustCompile(`(?i)\b(?:https?://|www\.)[^\s<>"]+`), "[url]"},
	{regexp.MustCompile(`\+?\d[\d\s().-]{7,}\d`), "[phone]"},
	{regexp.MustCompile(`\d{6,}`), "[number]"},
}

// Mask replaces e-mail addresses, URLs, phone numbers and runs of six or
// more digits in free text, and counts the replacements.
func Mask(text string) (string, int) {
	n := 0
	for _, p := range maskPatterns {
		text = p.re.ReplaceAllStringFunc(text, func(string) string {
			n++
			return p.with
		})
	}
	return text, n
}
