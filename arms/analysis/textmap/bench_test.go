package textmap

import "testing"

// BenchmarkArmsMap is the target: 20,000 messages in six arms,
// with 1,000 label permutations (the command's default).
func BenchmarkArmsMap(b *testing.B) {
	texts := synthetic(20000, 5)
	docs := make([]Doc, len(texts))
	names := []string{"a", "b", "c", "d", "e", "f"}
	for i, t := range texts {
		docs[i] = Doc{Arm: names[i%6], Text: t}
	}
	b.ResetTimer()
	for b.Loop() {
		if _, err := Build(docs, names, Options{Permutations: 1000, Seed: 1}); err != nil {
			b.Fatal(err)
		}
	}
}
