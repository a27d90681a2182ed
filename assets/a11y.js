/* LatentDesk: keyboard and screen-reader support the Dash components do not give by
   themselves (WCAG 2.2 AA). Dash serves every .js file of assets/ on its pages.

   1. Tabs (webapp/web/pages/dataset_tabs.py): in a role="tablist", Left/Right move the
      focus to the previous/next tab (wrapping), Home/End to the first/last; Enter or
      Space opens the tab with focus (WAI-ARIA Authoring Practices, "Tabs", manual
      activation: opening a tab fetches and draws its plots, so moving along the tabs
      does not open each one on the way).
   2. Dash 4 dropdowns: the hidden input Dash puts in front of the button for Safari is
      focusable but aria-hidden; it is made inert and the button itself takes the Tab
      stop. The button is named by its label ("<id>-label", webapp/web/ui/fields.py)
      followed by its value, not by its value alone; the open list is named the same.
   3. Dash 4 option lists (RadioItems, Checklist, a dropdown's open list): a listbox of
      role="option" labels that each hold a focusable native input. The native inputs
      carry the semantics, so the list becomes a radiogroup/group named by its label
      and the option roles go.
   4. Uploads: the file input is named by the drop zone's text.

   Dash renders and re-renders parts of the page at any time, so the repairs run
   again after every change of the page (once per animation frame at most). */
(function () {
    'use strict';

    // The label of control ``id``: the element "<id>-label", else a <label for="<id>"> (given that id).
    function labelOf(id) {
        if (!id) {
            return null;
        }
        let label = document.getElementById(id + '-label');
        if (!label) {
            label = document.querySelector('label[for="' + CSS.escape(id) + '"]');
            if (label && !label.id) {
                label.id = id + '-label';
            }
        }
        return label;
    }

    function setAttr(element, name, value) {
        if (element.getAttribute(name) !== value) {
            element.setAttribute(name, value);
        }
    }

    // 1. tabs
    function onTabKey(event) {
        const tab = event.target.closest && event.target.closest('[role="tab"]');
        const list = tab && tab.closest('[role="tablist"]');
        if (!list) {
            return;
        }
        const tabs = Array.from(list.querySelectorAll('[role="tab"]'));
        const at = tabs.indexOf(tab);
        const next = {
            ArrowRight: tabs[(at + 1) % tabs.length],
            ArrowLeft: tabs[(at - 1 + tabs.length) % tabs.length],
            Home: tabs[0],
            End: tabs[tabs.length - 1],
        }[event.key];
        if (!next) {
            return;
        }
        event.preventDefault();
        next.focus();
    }

    // 2. dropdowns
    function repairDropdown(button) {
        const standIn = button.previousElementSibling;
        if (standIn && standIn.classList.contains('dash-dropdown-focus-target') && !standIn.inert) {
            standIn.inert = true;
            standIn.tabIndex = -1;
        }
        if (button.tabIndex !== 0) {
            button.tabIndex = 0;
        }
        const label = labelOf(button.id);
        if (label) {
            setAttr(button, 'aria-labelledby', [label.id, button.id + '-value-count', button.id + '-value'].join(' '));
        }
    }

    // 3. option lists
    function repairOptionList(list) {
        setAttr(list, 'role', list.querySelector('input[type="radio"]') ? 'radiogroup' : 'group');
        let label = labelOf(list.id);
        const popover = list.closest('.dash-dropdown-content');
        if (popover) {
            const wrapper = popover.closest('.dash-dropdown-wrapper');
            const button = wrapper && wrapper.querySelector('button.dash-dropdown');
            label = button && labelOf(button.id);
            if (label) {
                setAttr(popover, 'aria-labelledby', label.id);
            }
        }
        if (label) {
            setAttr(list, 'aria-labelledby', label.id);
        }
        list.querySelectorAll('.dash-options-list-option').forEach(function (option) {
            option.removeAttribute('role');
            option.removeAttribute('aria-selected');
        });
    }

    // 4. uploads
    function repairUpload(input) {
        if (input.labels.length || input.hasAttribute('aria-labelledby')) {
            return;
        }
        const zone = input.parentElement;
        setAttr(input, 'aria-label', (zone && zone.textContent.trim()) || 'Choose a file');
    }

    function repairAll() {
        document.querySelectorAll('button.dash-dropdown').forEach(repairDropdown);
        document.querySelectorAll('.dash-options-list').forEach(repairOptionList);
        document.querySelectorAll('input[type="file"]').forEach(repairUpload);
    }

    let pending = false;
    function schedule() {
        if (!pending) {
            pending = true;
            window.requestAnimationFrame(function () {
                pending = false;
                repairAll();
            });
        }
    }

    document.addEventListener('keydown', onTabKey);
    new MutationObserver(schedule).observe(document.documentElement, {
        subtree: true,
        childList: true,
        attributes: true,
        attributeFilter: ['role', 'aria-selected', 'aria-labelledby', 'tabindex', 'id'],
    });
    schedule();
})();
