package api

import (
	"context"
	"encoding/json"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"strconv"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/chromedp/chromedp"

	"tidemark/learner"
)

// TestPageInABrowser drives the operators' page in a real browser (Debian's
// chromium through chromedp; CI installs it and sets
// TIDEMARK_REQUIRE_CHROMIUM=1, elsewhere the test skips without it). The
// service learns two days of the demo scenario, with a checkpoint taken
// before the stuck-sensor burst. On the page: a series per learner; the
// table's figures equal GET /v1/learners; a restore without the token is
// refused and the page shows why; with it, a dry run says what would be
// replayed and left out, the restore is accepted, and the checkpoint strip
// shows it; no script error. A screenshot is saved in the
// test's temporary directory (or at $TIDEMARK_SCREENSHOT).
func TestPageInABrowser(t *testing.T) {
	browser := ""
	for _, name := range []string{"chromium", "chromium-browser", "google-chrome"} {
		if p, err := exec.LookPath(name); err == nil {
			browser = p
			break
		}
	}
	if browser == "" {
		if os.Getenv("TIDEMARK_REQUIRE_CHROMIUM") != "" {
			t.Fatal("chromium is required (apt-get install -y chromium)")
		}
		t.Skip("chromium not installed (apt-get install -y chromium); CI runs this test")
	}
	const tok = "page-test-token"
	cfg := testConfig(t, t.TempDir())
	cfg.Token, cfg.CurveEvery = tok, 20
	r := start(t, cfg)
	lines := scenario(t, 2)
	burst := "2026-03-02T10:00:00Z"
	var before, after [][]byte
	for _, l := range lines {
		var ev learner.Event
		learner.DecodeEvent(l, &ev)
		if time.Unix(0, ev.Time).UTC().Format(time.RFC3339) < burst {
			before = append(before, l)
		} else {
			after = append(after, l)
		}
	}
	r.post(t, tok, before)
	r.waitCovered(t, int64(len(before)))
	code, b := r.call(t, "POST", "/v1/checkpoints", tok, nil)
	if code != 201 {
		t.Fatalf("checkpoint: %d %s", code, b)
	}
	var ck struct{ Version uint64 }
	json.Unmarshal(b, &ck)
	// Answers served for the next 40 events, which come as their labels.
	for i := range 40 {
		l := after[i]
		id := fmt.Sprintf("page-%d", i)
		code, b := r.call(t, "POST", "/v1/predict", "", fmt.Appendf(nil, `{"learner":%q,"answer_id":%q,%s`, serviceSpecs[i%len(serviceSpecs)], id, l[1:]))
		if code != 200 {
			t.Fatalf("predict: %d %s", code, b)
		}
		after[i] = fmt.Appendf(nil, `{"answer_id":%q,%s`, id, l[1:])
	}
	r.post(t, tok, after)
	rep := r.waitCovered(t, int64(len(lines)))

	opts := append(chromedp.DefaultExecAllocatorOptions[:], chromedp.ExecPath(browser), chromedp.NoSandbox,
		chromedp.Flag("headless", true), chromedp.WindowSize(1280, 1000))
	actx, cancelA := chromedp.NewExecAllocator(context.Background(), opts...)
	defer cancelA()
	ctx, cancel := chromedp.NewContext(actx)
	defer cancel()
	ctx, cancelT := context.WithTimeout(ctx, 90*time.Second)
	defer cancelT()
	var mu sync.Mutex
	var scriptErrors []string
	messages := chromedp.Console(ctx) // subscribed now: nothing the page says is missed
	go func() {
		for m, err := range messages {
			if err != nil {
				return
			}
			// The refused restore is the one failed request the test makes
			// on purpose; any other failure (a missing asset) counts.
			deliberate := m.Source == "network" && strings.Contains(m.Text, "401")
			if (m.Type == chromedp.ConsoleError || m.IsException()) && !deliberate {
				mu.Lock()
				scriptErrors = append(scriptErrors, m.String())
				mu.Unlock()
			}
		}
	}()
	err := chromedp.Do(ctx, chromedp.Navigate(r.base+"/"), chromedp.WaitVisible(chromedp.CSS(`#chart path.series`)))
	if err != nil {
		t.Fatal(err)
	}
	series, err := chromedp.Run(ctx, chromedp.Evaluate[int](`document.querySelectorAll("#chart path.series").length`))
	if err != nil {
		t.Fatal(err)
	}
	type row struct {
		Learner string `json:"learner"`
		RMSE    string `json:"rmse"`
		Served  string `json:"served"`
	}
	table, err := chromedp.Run(ctx, chromedp.Evaluate[[]row](`[...document.querySelectorAll("#learners tbody tr")].map(tr => ({learner: tr.dataset.learner, rmse: tr.children[1].dataset.value, served: tr.querySelector("td.served").dataset.value}))`))
	if err != nil {
		t.Fatal(err)
	}
	if series != len(serviceSpecs) {
		t.Errorf("the chart draws %d series, want one per learner (%d)", series, len(serviceSpecs))
	}
	if len(table) != len(rep.Learners) {
		t.Fatalf("the table has %d rows, the service %d learners", len(table), len(rep.Learners))
	}
	for _, row := range table {
		found := false
		for _, l := range rep.Learners {
			if l.Name == row.Learner {
				found = true
				got, err := strconv.ParseFloat(row.RMSE, 64)
				if l.Recent.RMSE == nil || err != nil || got != *l.Recent.RMSE {
					t.Errorf("%s: the page shows recent rmse %q, GET /v1/learners %v", row.Learner, row.RMSE, l.Recent.RMSE)
				}
				for _, m := range rep.Served.Learners {
					if m.Name == l.Name {
						got, err := strconv.ParseFloat(row.Served, 64)
						if m.RMSE == nil || m.Labelled != 10 || err != nil || got != *m.RMSE {
							t.Errorf("%s: the page shows served rmse %q, GET /v1/learners %v over %d answers (want 10)", row.Learner, row.Served, m.RMSE, m.Labelled)
						}
					}
				}
			}
		}
		if !found {
			t.Errorf("the page shows a learner %q the service does not have", row.Learner)
		}
	}
	// Restore to the checkpoint before the burst, leaving the burst out:
	// first without the token, then with it.
	version := strconv.FormatUint(ck.Version, 10)
	err = chromedp.Do(ctx,
		chromedp.SetValue(chromedp.ID(`r-version`), version),
		chromedp.Click(chromedp.CSS(`input[name=mode][value=skip]`)),
		chromedp.SendKeys(chromedp.ID(`r-from`), burst),
		chromedp.SendKeys(chromedp.ID(`r-to`), "2026-03-02T16:00:00Z"),
		chromedp.Click(chromedp.CSS(`#restore button[type=submit]`)),
		chromedp.WaitVisible(chromedp.Search(`//output[@id="answer" and contains(., "Not restored")]`)),
	)
	if err != nil {
		t.Fatalf("restore without the token: %v", err)
	}
	refused, _ := chromedp.Run(ctx, chromedp.Text(chromedp.ID(`answer`)))
	err = chromedp.Do(ctx,
		chromedp.SendKeys(chromedp.ID(`r-token`), tok),
		chromedp.Click(chromedp.ID(`r-dry`)),
		chromedp.WaitVisible(chromedp.Search(`//output[@id="answer" and contains(., "would replay")]`)),
	)
	counted, _ := chromedp.Run(ctx, chromedp.Text(chromedp.ID(`answer`)))
	if err != nil || !strings.Contains(counted, "leave out") {
		t.Fatalf("the dry run from the page: %v (answer %q)", err, counted)
	}
	err = chromedp.Do(ctx,
		chromedp.Click(chromedp.CSS(`#restore button[type=submit]`)),
		chromedp.WaitVisible(chromedp.Search(`//output[@id="answer" and contains(., "Restored checkpoint")]`)),
		chromedp.WaitVisible(chromedp.CSS(`#timeline .ckpt[data-reason="restore"]`)),
	)
	accepted, _ := chromedp.Run(ctx, chromedp.Text(chromedp.ID(`answer`)))
	if err != nil {
		t.Fatalf("restore with the token: %v (answers %q, %q)", err, refused, accepted)
	}
	if !strings.Contains(refused, "401") || !strings.Contains(refused, "token") {
		t.Errorf("the refusal shown: %q", refused)
	}
	if !strings.Contains(accepted, "Restored checkpoint "+version) {
		t.Errorf("the acceptance shown: %q", accepted)
	}
	shot, err := chromedp.Run(ctx, chromedp.FullScreenshot(100))
	if err != nil {
		t.Fatal(err)
	}
	// On a phone's width the page fits: nothing scrolls sideways but the
	// tables, in their own boxes.
	err = chromedp.Do(ctx, chromedp.EmulateViewport(390, 844, chromedp.EmulateMobile), chromedp.Sleep(300*time.Millisecond))
	if err != nil {
		t.Fatal(err)
	}
	overflow, err := chromedp.Run(ctx, chromedp.Evaluate[int](`document.documentElement.scrollWidth - document.documentElement.clientWidth`))
	if err != nil || overflow > 0 {
		widest, _ := chromedp.Run(ctx, chromedp.Evaluate[string](`[...document.querySelectorAll("body *")].filter(e => e.getBoundingClientRect().right > document.documentElement.clientWidth && !e.closest(".scroll")).map(e => e.tagName + "#" + e.id + "." + e.className).slice(0, 5).join(" ")`))
		t.Errorf("on a 390 px wide screen the page is %d px too wide (%v): %s", overflow, err, widest)
	}
	if err := chromedp.Do(ctx, chromedp.EmulateReset()); err != nil {
		t.Fatal(err)
	}
	path := filepath.Join(t.TempDir(), "page.png")
	if p := os.Getenv("TIDEMARK_SCREENSHOT"); p != "" {
		path = p
	}
	if err := os.WriteFile(path, shot, 0o644); err != nil {
		t.Fatal(err)
	}
	t.Logf("screenshot: %s (%d bytes)", path, len(shot))
	mu.Lock()
	defer mu.Unlock()
	if len(scriptErrors) > 0 {
		t.Errorf("script errors on the page: %v", scriptErrors)
	}
}
