// The group page's keys: Esc leaves the text box for the grid, a region's key ticks or unticks it, + then a region's key opens that
// region's own box (what it shows besides; Enter or Esc goes back to the grid), / goes back to the text box, Enter saves.
(function () {
  "use strict";
  var form = document.querySelector("[data-group-form]");
  if (!form) return;
  var input = form.querySelector("[data-labels]");
  var list = form.querySelector("[data-suggestions]");
  var grid = form.querySelector("[data-crop-grid]");
  var boxes = {};
  var additions = {};
  var adding = false;  // + was pressed: the next region key opens that region's box
  Array.prototype.forEach.call(form.querySelectorAll("[data-tick]"), function (box) {
    boxes[box.getAttribute("data-key")] = box;
    box.addEventListener("change", mark);
  });
  Array.prototype.forEach.call(form.querySelectorAll("[data-also]"), function (box) {
    additions[box.getAttribute("data-also-key")] = box;
    box.addEventListener("keydown", function (e) {
      if (e.key === "Enter" || e.key === "Escape") { e.preventDefault(); e.stopPropagation(); toGrid(); }  // not also a save
    });
  });

  function mark() {
    Array.prototype.forEach.call(form.querySelectorAll("[data-crop-cell]"), function (cell) {
      var box = cell.querySelector("[data-tick]");
      cell.setAttribute("data-unticked", box.checked ? "0" : "1");
    });
  }

  function toGrid() {
    adding = false;
    grid.focus();
    form.setAttribute("data-mode", "grid");
  }

  input.addEventListener("keydown", function (e) {
    if (e.key === "Escape" && list.hidden) { e.preventDefault(); toGrid(); }
  });

  document.addEventListener("keydown", function (e) {
    var active = document.activeElement;
    if (e.altKey || e.ctrlKey || e.metaKey || (active && active.tagName === "INPUT" && active.type !== "checkbox")) return;
    if (e.key === "/") { e.preventDefault(); input.focus(); form.setAttribute("data-mode", "text"); return; }
    if (e.key === "Enter") { e.preventDefault(); form.requestSubmit(form.querySelector("[data-submit]")); return; }
    if (e.key === "+") { e.preventDefault(); adding = true; form.setAttribute("data-mode", "adding"); return; }
    var key = e.key.toLowerCase();
    if (adding && additions[key]) {
      e.preventDefault();
      adding = false;
      if (!boxes[key].checked) { boxes[key].checked = true; mark(); }  // what a region shows besides is kept for a ticked one only
      additions[key].focus();
      form.setAttribute("data-mode", "also");
      return;
    }
    adding = false;
    var box = boxes[key];
    if (box) { e.preventDefault(); box.checked = !box.checked; mark(); }
  });
  grid.setAttribute("tabindex", "-1");
  mark();
})();
