//go:build race

package main

// raceEnabled is true when the tests are built with -race, which makes the
// daemon about ten times slower: the end-to-end tests size their runs by it.
const raceEnabled = true
