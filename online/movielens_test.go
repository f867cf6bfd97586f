package online

// Accuracy on open data: MovieLens latest-small (F. M. Harper and J. A.
// Konstan, "The MovieLens datasets: history and context", ACM TiiS 5(4),
// 2015; GroupLens research license), read in place from the shared data
// folder and never copied into the repository.

import (
	"bufio"
	"bytes"
	"cmp"
	"fmt"
	"math"
	"math/rand/v2"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"testing"
)

// mlRating is one line of ratings.csv.
type mlRating struct {
	user, movie int64
	value       float64
	time        int64 // seconds since the Unix epoch
	uid, mid    []byte
}

// movieLensPath returns the path of ratings.csv, or skips the test when the
// data is absent (it fails instead when FRESHET_REQUIRE_DATA=1). The data
// folder is FRESHET_DATA_DIR when set, else ../../shared/data relative to
// this package (the repository and shared/ side by side).
func movieLensPath(t *testing.T) string {
	t.Helper()
	dir := os.Getenv("FRESHET_DATA_DIR")
	if dir == "" {
		dir = filepath.Join("..", "..", "shared", "data")
	}
	p := filepath.Join(dir, "movielens-latest-small", "ratings.csv")
	if _, err := os.Stat(p); err != nil {
		if os.Getenv("FRESHET_REQUIRE_DATA") == "1" {
			t.Fatalf("MovieLens data required (FRESHET_REQUIRE_DATA=1): %v", err)
		}
		t.Skipf("MovieLens data not found (%v); set FRESHET_DATA_DIR to the folder holding movielens-latest-small", err)
	}
	return p
}

// parseMovieLens reads ratings.csv: a header "userId,movieId,rating,timestamp"
// then one rating per line, CRLF or LF line endings. Errors name the line and
// the field.
func parseMovieLens(path string) ([]mlRating, error) {
	f, err := os.Open(path)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	sc := bufio.NewScanner(f)
	var out []mlRating
	line := 0
	for sc.Scan() {
		line++
		b := bytes.TrimSuffix(sc.Bytes(), []byte("\r"))
		if line == 1 {
			if string(b) != "userId,movieId,rating,timestamp" {
				return nil, fmt.Errorf("%s: line 1: header %q, want userId,movieId,rating,timestamp", path, b)
			}
			continue
		}
		if len(b) == 0 {
			continue
		}
		fields := bytes.Split(b, []byte(","))
		if len(fields) != 4 {
			return nil, fmt.Errorf("%s: line %d: %d fields, want 4", path, line, len(fields))
		}
		var r mlRating
		names := [4]string{"userId", "movieId", "rating", "timestamp"}
		ints := [4]*int64{&r.user, &r.movie, nil, &r.time}
		for j, fld := range fields {
			if j == 2 {
				if r.value, err = strconv.ParseFloat(string(fld), 64); err != nil || math.IsNaN(r.value) || math.IsInf(r.value, 0) {
					return nil, fmt.Errorf("%s: line %d: field %s: bad number %q", path, line, names[j], fld)
				}
				continue
			}
			if *ints[j], err = strconv.ParseInt(string(fld), 10, 64); err != nil {
				return nil, fmt.Errorf("%s: line %d: field %s: bad integer %q", path, line, names[j], fld)
			}
		}
		r.uid = []byte("u" + string(fields[0]))
		r.mid = []byte("m" + string(fields[1]))
		out = append(out, r)
	}
	if err := sc.Err(); err != nil {
		return nil, fmt.Errorf("%s: after line %d: %w", path, line, err)
	}
	return out, nil
}

// mlSplit is the deterministic 80/20 split of REFERENCES.md: a rating is in
// the test set when (userId·7919 + movieId) mod 5 == 0.
func mlSplit(all []mlRating) (train, test []mlRating) {
	for _, r := range all {
		if (r.user*7919+r.movie)%5 == 0 {
			test = append(test, r)
		} else {
			train = append(train, r)
		}
	}
	return train, test
}

// mlModel returns an explicit model on MovieLens's 0.5–5 scale.
func mlModel(t *testing.T, o Options) *Model {
	t.Helper()
	o.MinValue, o.MaxValue = 0.5, 5
	m, err := New(o)
	if err != nil {
		t.Fatal(err)
	}
	return m
}

// biasOnly turns the factors of o off in effect: rank 1, initial factors of
// size 1e-9 and a factor learning rate of 1e-9, so p·q stays below 1e-16 and
// the model is μ + b_u + b_i with the same bias SGD as the full model.
func biasOnly(o Options) Options {
	o.Rank, o.InitStd, o.LearnRate = 1, 1e-9, 1e-9
	return o
}

// mlTrain runs epochs of SGD over train, shuffled each epoch by a PCG
// generator seeded with (seed, epoch).
func mlTrain(t *testing.T, m *Model, train []mlRating, epochs int, seed uint64) {
	t.Helper()
	users := make([]int32, len(train))
	items := make([]int32, len(train))
	for j := range train {
		var err error
		if users[j], _, err = m.Intern(Users, train[j].uid, train[j].time*1000); err != nil {
			t.Fatal(err)
		}
		if items[j], _, err = m.Intern(Items, train[j].mid, train[j].time*1000); err != nil {
			t.Fatal(err)
		}
	}
	order := make([]int, len(train))
	for j := range order {
		order[j] = j
	}
	for ep := range epochs {
		rng := rand.New(rand.NewPCG(seed, uint64(ep)))
		rng.Shuffle(len(order), func(a, b int) { order[a], order[b] = order[b], order[a] })
		for _, j := range order {
			if _, err := m.Step(users[j], items[j], train[j].value, train[j].time*1000); err != nil {
				t.Fatalf("epoch %d, rating %d: %v", ep, j, err)
			}
		}
	}
}

// mlRMSE returns the RMSE of m on test; an unknown user or movie contributes
// nothing to the prediction (see Model.Predict).
func mlRMSE(m *Model, test []mlRating) float64 {
	var se float64
	for _, r := range test {
		u, ok := m.Lookup(Users, r.uid)
		if !ok {
			u = -1
		}
		i, ok := m.Lookup(Items, r.mid)
		if !ok {
			i = -1
		}
		e := r.value - m.Predict(u, i)
		se += e * e
	}
	return math.Sqrt(se / float64(len(test)))
}

// mlOptions are the settings of the MovieLens runs: the usual biased-MF
// ranges of Koren, Bell & Volinsky 2009 (γ ≈ 0.005–0.01, λ ≈ 0.02–0.05).
var mlOptions = Options{Rank: 20, LearnRate: 0.01, BiasLearnRate: 0.01, Reg: 0.05, BiasReg: 0.02, Seed: 1}

// mlOnlineOptions are the settings of the one-pass replay: the same, with a
// bias step of 0.05, since each bias sees its ratings once instead of 25
// times (measured: bias step 0.01 gives prequential RMSE 0.917, 0.03 gives
// 0.879, 0.05 gives 0.868, for MF and the bias-only model alike).
var mlOnlineOptions = Options{Rank: 20, LearnRate: 0.01, BiasLearnRate: 0.05, Reg: 0.05, BiasReg: 0.02, Seed: 1}

// TestMovieLensOffline trains on the 80% split for several epochs and checks
// the test RMSE of three predictors against each other and the published
// range. Reference values for this split (REFERENCES.md, an independent SGD
// run): global mean 1.0497, user+item bias 0.8882, biased MF (k = 20) 0.8687;
// published biased MF on MovieLens latest-small: 0.86–0.88 (from memory).
//
// The bias baseline is the Model itself with the factors disabled in effect
// (biasOnly), trained the same way. Measured: 1.0497, 0.8718, 0.8655 (the
// gain of the factors over the biases is small on this small dataset, and a
// factor step of 0.02 already overfits: 0.8737).
func TestMovieLensOffline(t *testing.T) {
	all, err := parseMovieLens(movieLensPath(t))
	if err != nil {
		t.Fatal(err)
	}
	train, test := mlSplit(all)
	const epochs = 25

	var sum Neumaier
	for _, r := range train {
		sum.Add(r.value)
	}
	mean := sum.Value() / float64(len(train))
	var se float64
	for _, r := range test {
		se += (r.value - mean) * (r.value - mean)
	}
	rmseMean := math.Sqrt(se / float64(len(test)))

	bias := mlModel(t, biasOnly(mlOptions))
	mlTrain(t, bias, train, epochs, 2)
	rmseBias := mlRMSE(bias, test)

	mf := mlModel(t, mlOptions)
	mlTrain(t, mf, train, epochs, 2)
	rmseMF := mlRMSE(mf, test)

	t.Logf("MovieLens latest-small, %d train / %d test ratings, %d epochs: test RMSE global mean %.4f, user+item bias %.4f, biased MF (k = %d) %.4f",
		len(train), len(test), epochs, rmseMean, rmseBias, mlOptions.Rank, rmseMF)
	if len(all) != 100836 { // README of the dataset: 100,836 ratings
		t.Errorf("read %d ratings, the dataset has 100,836", len(all))
	}
	// The global mean of the train split is fixed by the data and the split,
	// so it must match the independent run of REFERENCES.md (1.0497, four
	// decimals): a check of the parsing and of the split.
	if math.Abs(rmseMean-1.0497) > 0.5e-4 {
		t.Errorf("global-mean test RMSE %.5f, the independent run gave 1.0497", rmseMean)
	}
	if !(rmseMean > rmseBias && rmseBias > rmseMF) {
		t.Errorf("want RMSE global mean %.4f > bias %.4f > MF %.4f", rmseMean, rmseBias, rmseMF)
	}
	if rmseMF > 0.88 { // published biased MF on this dataset: 0.86–0.88 (from memory)
		t.Errorf("biased MF test RMSE %.4f > 0.88", rmseMF)
	}
}

// TestMovieLensPrequential replays all ratings once in time order (ties by
// userId, then movieId), test-then-train, for biased MF, the bias-only
// model and the running global mean, and logs their prequential RMSEs
// (Gama, Sebastião & Rodrigues 2013: each error is taken before the model
// learns the rating).
func TestMovieLensPrequential(t *testing.T) {
	all, err := parseMovieLens(movieLensPath(t))
	if err != nil {
		t.Fatal(err)
	}
	slices.SortFunc(all, func(a, b mlRating) int {
		return cmp.Or(cmp.Compare(a.time, b.time), cmp.Compare(a.user, b.user), cmp.Compare(a.movie, b.movie))
	})
	replay := func(m *Model) float64 {
		mon, err := NewMonitor(MonitorOptions{MinValue: 0.5, MaxValue: 5})
		if err != nil {
			t.Fatal(err)
		}
		for j := range all {
			r := &all[j]
			u, newU, err := m.Intern(Users, r.uid, r.time*1000)
			if err != nil {
				t.Fatal(err)
			}
			i, newI, err := m.Intern(Items, r.mid, r.time*1000)
			if err != nil {
				t.Fatal(err)
			}
			pred, err := m.Step(u, i, r.value, r.time*1000)
			if err != nil {
				t.Fatalf("rating %d: %v", j, err)
			}
			mon.ObserveRating(pred, r.value, newU, newI)
		}
		st := mon.Status()
		return math.Sqrt(st.SquaredErrorTotal / float64(st.Events))
	}
	rmseMF := replay(mlModel(t, mlOnlineOptions))
	rmseBias := replay(mlModel(t, biasOnly(mlOnlineOptions)))

	// Running global mean: the mean of the ratings before this one (the
	// middle of the scale, 2.75, before the first), fed to a monitor the same way.
	mon, err := NewMonitor(MonitorOptions{MinValue: 0.5, MaxValue: 5})
	if err != nil {
		t.Fatal(err)
	}
	var sum Neumaier
	for j, r := range all {
		pred := 2.75
		if j > 0 {
			pred = sum.Value() / float64(j)
		}
		mon.ObserveRating(pred, r.value, false, false)
		sum.Add(r.value)
	}
	st := mon.Status()
	rmseMean := math.Sqrt(st.SquaredErrorTotal / float64(st.Events))

	t.Logf("MovieLens latest-small, one pass in time order, %d ratings: prequential RMSE global mean %.4f, user+item bias %.4f, biased MF (k = %d) %.4f",
		len(all), rmseMean, rmseBias, mlOnlineOptions.Rank, rmseMF)
	for name, v := range map[string]float64{"MF": rmseMF, "bias": rmseBias} {
		if math.IsNaN(v) || math.IsInf(v, 0) || !(v < rmseMean) {
			t.Errorf("%s prequential RMSE %.4f: want finite and below the global mean's %.4f", name, v, rmseMean)
		}
	}
	// Measured: MF 0.8681 against bias-only 0.8675 (ratio 1.0007): in one
	// pass over 100k ratings, most users' few ratings arrive before their
	// factors mean anything, so MF only matches the biases. The bound allows
	// MF to be 2% worse (measured 0.07%), so it catches a broken factor step
	// that adds error, not a lack of gain.
	if rmseMF > 1.02*rmseBias {
		t.Errorf("MF prequential RMSE %.4f more than 2%% above the bias-only %.4f", rmseMF, rmseBias)
	}
}

// TestParseMovieLensErrors checks that the reader of ratings.csv names the
// line and the field of bad input, and reads CRLF and LF lines alike.
func TestParseMovieLensErrors(t *testing.T) {
	const header = "userId,movieId,rating,timestamp\r\n"
	cases := []struct {
		name, text, want string
	}{
		{"header", "user,movie,rating,time\r\n1,2,3.5,4\r\n", "line 1: header"},
		{"fields", header + "1,2,3.5,4\r\n1,2,3.5\r\n", "line 3: 3 fields, want 4"},
		{"user", header + "x,2,3.5,4\r\n", `line 2: field userId: bad integer "x"`},
		{"movie", header + "1,,3.5,4\r\n", `line 2: field movieId: bad integer ""`},
		{"rating", header + "1,2,NaN,4\r\n", `line 2: field rating: bad number "NaN"`},
		{"time", header + "1,2,3.5,4.5\r\n", `line 2: field timestamp: bad integer "4.5"`},
	}
	dir := t.TempDir()
	for _, c := range cases {
		p := filepath.Join(dir, c.name+".csv")
		if err := os.WriteFile(p, []byte(c.text), 0o600); err != nil {
			t.Fatal(err)
		}
		_, err := parseMovieLens(p)
		if err == nil || !bytes.Contains([]byte(err.Error()), []byte(c.want)) {
			t.Errorf("%s: error %v, want it to contain %q", c.name, err, c.want)
		}
	}
	p := filepath.Join(dir, "good.csv")
	if err := os.WriteFile(p, []byte("userId,movieId,rating,timestamp\n1,2,3.5,4\r\n5,6,0.5,7\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	got, err := parseMovieLens(p)
	if err != nil {
		t.Fatal(err)
	}
	want := []mlRating{{user: 1, movie: 2, value: 3.5, time: 4, uid: []byte("u1"), mid: []byte("m2")},
		{user: 5, movie: 6, value: 0.5, time: 7, uid: []byte("u5"), mid: []byte("m6")}}
	if len(got) != len(want) {
		t.Fatalf("read %d ratings, want %d", len(got), len(want))
	}
	for j := range want {
		g, w := got[j], want[j]
		if g.user != w.user || g.movie != w.movie || g.value != w.value || g.time != w.time ||
			!bytes.Equal(g.uid, w.uid) || !bytes.Equal(g.mid, w.mid) {
			t.Errorf("rating %d: got %+v, want %+v", j, g, w)
		}
	}
}
