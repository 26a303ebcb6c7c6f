// The station view: scanning, start and stop, the live screen, and the operator's questions.
// Everything shown is set as text (never as markup); every answer goes back as the line the
// terminal would read, and the server checks it the same way.
"use strict";
(function () {
  const setup = JSON.parse(document.getElementById("setup-data").textContent);
  const $ = (id) => document.getElementById(id);
  let screen = null;
  let shownPrompt = null;
  let receivedAt = 0;

  $("caution-line").textContent = setup.caution.replace(/^CAUTION: mains voltage\.\s*/, "");
  $("caution-text").textContent = setup.caution;

  for (const p of setup.plans) $("plan").append(new Option(p.label, p.name));
  for (const b of setup.benches) $("bench").append(new Option(b.label, b.key));
  if (setup.first_plan) $("plan").value = setup.first_plan;
  const saved = (k) => sessionStorage.getItem("meterproof." + k);
  for (const k of ["plan", "bench", "operator", "lot"]) {
    const v = saved(k);
    if (v !== null) $(k).value = v;
  }

  function bench() {
    return setup.benches.find((b) => b.key === $("bench").value) || setup.benches[0];
  }

  // One field per position; a scanner types the serial and Enter, which moves on.
  function drawSerials() {
    const list = $("serials");
    const old = [...list.querySelectorAll("input")].map((i) => i.value);
    list.replaceChildren();
    for (let i = 0; i < bench().positions; i++) {
      const li = document.createElement("li");
      const input = document.createElement("input");
      input.id = "serial-" + (i + 1);
      input.setAttribute("aria-label", "Serial number of position " + (i + 1));
      input.spellcheck = false;
      input.value = old[i] || "";
      input.addEventListener("keydown", (e) => {
        if (e.key === "Enter") { e.preventDefault(); scanned(i); }
      });
      li.append(input);
      list.append(li);
    }
  }

  function serialInputs() { return [...$("serials").querySelectorAll("input")]; }

  // A scanned serial: refused when empty or already in another position, else on to the next.
  function scanned(i) {
    const inputs = serialInputs();
    const input = inputs[i];
    const value = input.value.trim();
    input.value = value;
    input.classList.remove("dup");
    if (value === "") { $("form-error").textContent = "Position " + (i + 1) + ": scan the unit's serial number."; return; }
    const other = inputs.findIndex((x, j) => j !== i && x.value.trim() === value);
    if (other >= 0) {
      $("form-error").textContent = value + " is already in position " + (other + 1) + ": scan the unit in position " + (i + 1) + ".";
      input.classList.add("dup");
      input.select();
      return;
    }
    $("form-error").textContent = "";
    if (i + 1 < inputs.length) inputs[i + 1].focus(); else $("start").focus();
  }

  $("bench").addEventListener("change", () => { drawSerials(); sessionStorage.setItem("meterproof.bench", $("bench").value); });
  for (const k of ["plan", "operator", "lot"]) $(k).addEventListener("change", () => sessionStorage.setItem("meterproof." + k, $(k).value));
  $("clear").addEventListener("click", () => { for (const i of serialInputs()) { i.value = ""; i.classList.remove("dup"); } serialInputs()[0].focus(); });

  function headers() {
    const h = { "Content-Type": "application/json", "X-Meterproof-Key": setup.page_key };
    if (setup.token_needed && setup.remote_allowed) {
      let t = sessionStorage.getItem("meterproof.token");
      if (!t) { t = window.prompt("This is not the bench's machine: the station's token") || ""; sessionStorage.setItem("meterproof.token", t); }
      h["X-Meterproof-Token"] = t;
    }
    return h;
  }

  async function send(path, body) {
    const r = await fetch(path, { method: "POST", headers: headers(), body: JSON.stringify(body) });
    let answer = {};
    try { answer = await r.json(); } catch (e) { answer = { error: "the server answered " + r.status }; }
    if (!r.ok && !answer.error) answer.error = "the server answered " + r.status;
    return answer;
  }

  // Start: every field checked here first (the server checks again), then the caution.
  $("start").addEventListener("click", () => {
    const serials = serialInputs().map((i) => i.value.trim());
    const empty = serials.findIndex((s) => s === "");
    if (empty >= 0) { $("form-error").textContent = "Position " + (empty + 1) + " has no serial number: scan it."; serialInputs()[empty].focus(); return; }
    for (let i = 0; i < serials.length; i++) {
      const j = serials.indexOf(serials[i]);
      if (j !== i) { $("form-error").textContent = serials[i] + " is in position " + (j + 1) + " and in position " + (i + 1) + "."; serialInputs()[i].focus(); return; }
    }
    if ($("operator").value.trim() === "") { $("form-error").textContent = "Give the operator's id."; $("operator").focus(); return; }
    $("form-error").textContent = "";
    $("caution-dialog").showModal();
    $("caution-yes").focus();
  });
  $("caution-no").addEventListener("click", () => $("caution-dialog").close());
  $("caution-yes").addEventListener("click", async () => {
    $("caution-dialog").close();
    const answer = await send("/station/start", {
      plan: $("plan").value, bench: $("bench").value,
      serials: serialInputs().map((i) => i.value.trim()),
      operator: $("operator").value.trim(), lot: $("lot").value.trim(),
    });
    if (answer.error) $("form-error").textContent = answer.error;
  });
  $("stop").addEventListener("click", async () => {
    if (!window.confirm("Stop the run? The output goes off; the units not finished stay INCOMPLETE.")) return;
    const answer = await send("/station/stop", {});
    if (answer.error) $("run-error").textContent = answer.error;
  });

  function text(tag, cls, value) {
    const e = document.createElement(tag);
    if (cls) e.className = cls;
    e.textContent = value;
    return e;
  }

  function seconds(s) {
    s = Math.max(0, Math.round(s));
    return s >= 60 ? Math.floor(s / 60) + " min " + (s % 60) + " s" : s + " s";
  }

  function drawStep() {
    const step = screen && screen.step;
    if (!step) { $("step-line").textContent = ""; $("step-bar").hidden = true; return; }
    let line = "Step " + step.number + " of " + step.total + ": " + step.id + " · " + step.load;
    if (step.left_s !== null && step.measuring_s) {
      const left = Math.max(0, step.left_s - (Date.now() - receivedAt) / 1000);
      line += " · " + seconds(left) + " left";
      $("step-fill").style.width = (100 * (1 - left / step.measuring_s)).toFixed(1) + "%";
      $("step-bar").hidden = false;
    } else {
      $("step-bar").hidden = true;
    }
    $("step-line").textContent = line;
  }

  function drawPositions() {
    const list = $("positions");
    list.replaceChildren();
    for (const p of screen.positions) {
      const li = document.createElement("li");
      li.className = "unit " + (p.verdict ? p.verdict.status : p.state);
      li.id = "position-" + p.position;
      li.append(text("span", "pos", p.position));
      li.append(text("span", "serial", p.serial));
      const total = screen.step ? screen.step.total : null;
      let detail = p.state === "waiting" ? "waiting for the bench" : p.state === "refused" ? "left out before any load" : "";
      if (p.state === "testing" || p.state === "done") {
        detail = p.steps_done + (total ? " of " + total : "") + " steps done · " + p.readings + " readings";
        if (p.failed) detail += " · " + p.failed + " check" + (p.failed > 1 ? "s" : "") + " outside the limits";
      }
      if (p.model) detail += " · " + p.model + (p.firmware ? " fw " + p.firmware : "");
      li.append(text("span", "detail", detail));
      if (p.verdict) {
        const v = document.createElement("span");
        v.className = "verdict";
        v.append(text("span", "shape", p.verdict.symbol));
        v.append(text("span", "word", p.verdict.word));
        li.append(v);
        if (p.verdict.reasons.length) {
          const ul = document.createElement("ul");
          ul.className = "reasons";
          for (const r of p.verdict.reasons) ul.append(text("li", "", r));
          li.append(ul);
        }
      }
      if (p.report) {
        const a = text("a", "report", "Open the report of " + p.serial);
        a.href = p.report;
        a.target = "_blank";
        li.append(a);
      }
      list.append(li);
    }
  }

  const kinds = { load: "Set the load", reading: "Reference reading", confirm: "Confirm", text: "Answer" };

  function answerWith(value) {
    const prompt = shownPrompt;
    if (!prompt) return;
    send("/station/answer", { prompt: prompt.id, text: value }).then((a) => {
      if (a.error) $("run-error").textContent = a.error;
    });
    shownPrompt = null;
    $("prompt").close();
  }

  function button(label, cls, onClick) {
    const b = text("button", cls, label);
    b.type = "button";
    b.addEventListener("click", onClick);
    return b;
  }

  function drawPrompt() {
    const p = screen.prompt;
    if (!p) { if ($("prompt").open) $("prompt").close(); shownPrompt = null; document.title = "Station · meterproof"; return; }
    if (shownPrompt && shownPrompt.id === p.id) return;
    shownPrompt = p;
    document.title = "ANSWER NEEDED · meterproof";
    $("prompt-kind").textContent = kinds[p.kind] || "Answer";
    $("prompt-text").textContent = p.text;
    $("prompt-latest").textContent = screen.said.slice(-3).join("\n");
    const input = $("prompt-input");
    input.value = "";
    const buttons = $("prompt-buttons");
    buttons.replaceChildren();
    if (p.kind === "load") {
      input.hidden = true;
      input.placeholder = "the reason";
      const withReason = (word) => () => {
        if (input.hidden) { input.hidden = false; input.focus(); $("prompt-text").textContent = p.text + " Why " + word + "? Type the reason, then press the button again."; return; }
        if (input.value.trim() === "") { input.focus(); return; }
        answerWith(word + " " + input.value.trim());
      };
      buttons.append(button("The load is set: go on", "go", () => answerWith("")));
      buttons.append(button("Skip this step…", "plain", withReason("skip")));
      buttons.append(button("Abort the run…", "halt", withReason("abort")));
    } else if (p.kind === "confirm") {
      input.hidden = true;
      buttons.append(button("Yes", "halt", () => answerWith("yes")));
      buttons.append(button("No", "go", () => answerWith("")));
    } else {
      input.hidden = false;
      input.placeholder = p.kind === "reading" ? "the reading with its unit, as 5.02 A" : "";
      buttons.append(button("OK (Enter)", "go", () => answerWith(input.value.trim())));
    }
    if (!$("prompt").open) $("prompt").showModal();
    if (!input.hidden) input.focus(); else buttons.firstChild.focus();
  }
  // A question cannot be waved away: Escape does not close it.
  $("prompt").addEventListener("cancel", (e) => e.preventDefault());
  $("prompt-form").addEventListener("submit", (e) => {
    e.preventDefault();
    if (!shownPrompt) return;
    if (shownPrompt.kind === "load") { if ($("prompt-input").hidden) answerWith(""); return; }
    if (shownPrompt.kind !== "confirm") answerWith($("prompt-input").value.trim());
  });

  function draw() {
    const s = screen;
    $("run-title").textContent = s.run_id
      ? (s.busy ? "Running " : "Run ") + s.run_id + (s.plan ? " · " + s.plan : "") + " · " + s.bench + " · operator " + s.operator + (s.lot ? " · lot " + s.lot : "")
      : s.busy ? "Preparing the run on " + s.bench + "…" : "No run yet: scan the units and start.";
    drawStep();
    $("run-error").textContent = s.error || "";
    $("closing").textContent = s.closing ? (s.closing + (s.written_to ? " · records and reports in " + s.written_to : "")) : "";
    drawPositions();
    $("said").textContent = s.said.join("\n");
    $("said").scrollTop = $("said").scrollHeight;
    $("start").disabled = s.busy;
    $("stop").hidden = !s.busy;
    for (const e of $("setup").querySelectorAll("select, input")) e.disabled = s.busy;
    drawPrompt();
    document.body.dataset.version = s.version;
    document.body.dataset.busy = s.busy;
  }

  const events = new EventSource("/station/events");
  events.addEventListener("screen", (e) => {
    screen = JSON.parse(e.data);
    receivedAt = Date.now();
    draw();
  });
  events.addEventListener("error", () => { $("run-error").textContent = screen && screen.busy ? "The connection to the bench is lost; it is tried again." : ""; });
  setInterval(() => { if (screen) drawStep(); }, 250);

  drawSerials();
  const first = serialInputs().find((i) => i.value === "");
  (first || $("start")).focus();
})();
