// The group page's keys: Esc leaves the text box for the grid, a region's key ticks or unticks it, / goes back, Enter saves.
(function () {
  "use strict";
  var form = document.querySelector("[data-group-form]");
  if (!form) return;
  var input = form.querySelector("[data-labels]");
  var list = form.querySelector("[data-suggestions]");
  var boxes = {};
  Array.prototype.forEach.call(form.querySelectorAll("[data-tick]"), function (box) {
    boxes[box.getAttribute("data-key")] = box;
    box.addEventListener("change", mark);
  });

  function mark() {
    Array.prototype.forEach.call(form.querySelectorAll("[data-crop-cell]"), function (cell) {
      var box = cell.querySelector("[data-tick]");
      cell.setAttribute("data-unticked", box.checked ? "0" : "1");
    });
  }

  input.addEventListener("keydown", function (e) {
    if (e.key === "Escape" && list.hidden) {
      e.preventDefault();
      form.querySelector("[data-crop-grid]").focus();
      form.setAttribute("data-mode", "grid");
    }
  });

  document.addEventListener("keydown", function (e) {
    if (e.altKey || e.ctrlKey || e.metaKey || document.activeElement === input) return;
    if (e.key === "/") { e.preventDefault(); input.focus(); form.setAttribute("data-mode", "text"); return; }
    if (e.key === "Enter") { e.preventDefault(); form.requestSubmit(form.querySelector("[data-submit]")); return; }
    var box = boxes[e.key.toLowerCase()];
    if (box) { e.preventDefault(); box.checked = !box.checked; mark(); }
  });
  form.querySelector("[data-crop-grid]").setAttribute("tabindex", "-1");
  mark();
})();
