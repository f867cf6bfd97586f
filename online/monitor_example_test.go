package online

import "fmt"

func ExampleMonitor() {
	m, err := NewMonitor(MonitorOptions{Mode: Explicit, MinValue: 1, MaxValue: 5, Window: 4})
	if err != nil {
		panic(err)
	}
	// Test-then-train: each prediction was made before the model learned
	// the rating.
	for _, ev := range []struct{ pred, rating float64 }{{3, 4}, {3.5, 3}, {4, 5}, {2, 2}} {
		m.ObserveRating(ev.pred, ev.rating, false, false)
	}
	st := m.Status()
	// Errors 1, −0.5, 1, 0: RMSE = sqrt(2.25/4) = 0.75, MAE = 2.5/4.
	fmt.Printf("events %d, window RMSE %.4f, MAE %.4f\n", st.Events, st.RMSEWindow, st.MAEWindow)
	// Output: events 4, window RMSE 0.7500, MAE 0.6250
}

func ExampleTopN() {
	scores := []float32{0.2, 0.9, 0.5, 0.9, 0.1}
	// Best first; the tie at 0.9 goes to the lower index.
	fmt.Println(TopN(scores, 3, nil))
	fmt.Println(InTopN(scores, 3, 1), InTopN(scores, 3, 2))
	// Output:
	// [1 3 2]
	// false true
}
