//go:build race

package checkpoint

// raceEnabled is set under -race, where sync.Pool drops items at random and
// allocation counts of code using it (encoding/json) vary.
const raceEnabled = true
