;;; latchwatch.el --- latchwatch's language server through eglot  -*- lexical-binding: t; -*-

;; Load with (load "/path/to/editor-configs/emacs-eglot/latchwatch.el"), then M-x eglot
;; in a Python buffer of a folder trusted with `latchwatch trust PATH'.
;; Eglot runs one server per major mode and project: this entry makes latchwatch the
;; Python server.  To keep another Python server as well, use a mode derived from
;; python-mode for layout scripts and map that mode instead.

(require 'eglot)

(add-to-list 'eglot-server-programs
             '((python-mode python-ts-mode)
               . ("latchwatch" "serve"
                  :initializationOptions (:latchwatch (:debounce 500 :runOn "change")))))

;; Answers workspace/configuration (section "latchwatch"); per-project values go in
;; .dir-locals.el, but trustedFolders is read only from the user level (see README).
(setq-default eglot-workspace-configuration
              '(:latchwatch (:debounce 500)))

(provide 'latchwatch)
;;; latchwatch.el ends here
