// Keyboard-first labelling: Enter saves, Tab completes from the campaign's words, Alt+key for the rest.
(function () {
  "use strict";
  var form = document.querySelector("[data-label-form]");
  var input = form ? form.querySelector("[data-labels]") : null;
  var list = form ? form.querySelector("[data-suggestions]") : null;
  var picture = document.querySelector("[data-outline]");
  var help = document.querySelector("[data-instructions]");
  var started = Date.now();
  var vocab = { entities: [], attributes: [] };
  var shown = [];
  var chosen = 0;

  function click(selector) {
    var el = document.querySelector(selector);
    if (el) el.click();
  }

  function toggleOverlay() {
    if (!picture) return;
    var overlay = picture.getAttribute("data-showing") !== "overlay";
    picture.src = overlay ? picture.getAttribute("data-overlay-src") : picture.getAttribute("data-outline-src");
    picture.setAttribute("data-showing", overlay ? "overlay" : "outline");
  }

  function toggleHelp() {
    if (help) help.hidden = !help.hidden;
  }

  // The word being typed, and whether it names an entity (start or after ';') or an attribute (after ':' or ',').
  function fragment() {
    var upto = input.value.slice(0, input.selectionStart);
    var cut = Math.max(upto.lastIndexOf(";"), upto.lastIndexOf(":"), upto.lastIndexOf(","), upto.lastIndexOf("\n"));
    var sep = cut >= 0 ? upto.charAt(cut) : ";";
    var raw = upto.slice(cut + 1);
    var lead = raw.length - raw.replace(/^\s+/, "").length;
    return { start: cut + 1 + lead, text: raw.slice(lead).toLowerCase(), words: sep === ":" || sep === "," ? vocab.attributes : vocab.entities };
  }

  function render() {
    list.textContent = "";
    shown.forEach(function (word, i) {
      var li = document.createElement("li");
      li.textContent = word;  // never innerHTML: words come from other people
      li.setAttribute("role", "option");
      li.setAttribute("data-suggestion", word);
      if (i === chosen) li.setAttribute("aria-selected", "true");
      li.addEventListener("mousedown", function (e) { e.preventDefault(); chosen = i; take(); });
      list.appendChild(li);
    });
    list.hidden = shown.length === 0;
  }

  function suggest() {
    var f = fragment();
    shown = !f.text ? [] : f.words.filter(function (w) { return w.indexOf(f.text) === 0 && w !== f.text; }).slice(0, 6);
    chosen = 0;
    render();
  }

  function take() {
    var f = fragment();
    var word = shown[chosen];
    var before = input.value.slice(0, f.start);
    var after = input.value.slice(input.selectionStart);
    input.value = before + word + after;
    var at = (before + word).length;
    input.setSelectionRange(at, at);
    shown = [];
    render();
  }

  if (form) {
    form.addEventListener("submit", function () {
      form.querySelector("[data-seconds]").value = ((Date.now() - started) / 1000).toFixed(1);
    });
    input.addEventListener("input", suggest);
    input.addEventListener("blur", function () { shown = []; render(); });
    input.addEventListener("keydown", function (e) {
      if (list.hidden) return;
      if (e.key === "Tab" && !e.shiftKey) { e.preventDefault(); take(); }
      else if (e.key === "ArrowDown") { e.preventDefault(); chosen = (chosen + 1) % shown.length; render(); }
      else if (e.key === "ArrowUp") { e.preventDefault(); chosen = (chosen + shown.length - 1) % shown.length; render(); }
      else if (e.key === "Escape") { shown = []; render(); }
    });
    fetch("/api/campaigns/" + form.getAttribute("data-campaign") + "/vocabulary", { credentials: "same-origin" })
      .then(function (r) { return r.ok ? r.json() : null; })
      .then(function (v) { if (v) vocab = v; form.setAttribute("data-vocabulary", String(vocab.entities.length)); })
      .catch(function () {});
    var end = input.value.length;
    input.setSelectionRange(end, end);
  }

  var toggleButton = document.querySelector("[data-overlay-toggle]");
  if (toggleButton) toggleButton.addEventListener("click", toggleOverlay);
  var helpButton = document.querySelector("[data-help-toggle]");
  if (helpButton) helpButton.addEventListener("click", toggleHelp);

  document.addEventListener("keydown", function (e) {
    if (!e.altKey || e.ctrlKey || e.metaKey) return;
    var key = (e.code || "").replace("Key", "").toLowerCase() || e.key.toLowerCase();
    var actions = {
      n: function () { click("[data-nothing]"); },
      u: function () { var box = document.querySelector("[data-unsure]"); if (box) box.checked = !box.checked; },
      s: function () { click("[data-skip]"); },
      z: function () { click("[data-undo]"); },
      o: toggleOverlay,
      i: toggleHelp,
    };
    if (actions[key]) { e.preventDefault(); actions[key](); }
  });
  // Keys pressed before this point are lost; tests (and impatient people) can wait for it.
  document.body.setAttribute("data-ready", "1");
})();
