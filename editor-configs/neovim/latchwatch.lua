-- latchwatch for Neovim 0.8 or newer (vim.lsp.start).
-- Load it from init.lua:  dofile("/path/to/editor-configs/neovim/latchwatch.lua")
-- or copy it to ~/.config/nvim/plugin/latchwatch.lua.
-- Trust a project once with `latchwatch trust PATH`; scripts in untrusted folders never run.
local group = vim.api.nvim_create_augroup("latchwatch", { clear = true })

vim.api.nvim_create_autocmd("FileType", {
  group = group,
  pattern = "python",
  callback = function(args)
    local file = vim.api.nvim_buf_get_name(args.buf)
    if file == "" then
      return
    end
    local marker = vim.fs.find({ "latchwatch.toml", "pyproject.toml", ".git" },
      { upward = true, path = vim.fs.dirname(file) })[1]
    vim.lsp.start({
      name = "latchwatch",
      cmd = { "latchwatch", "serve" },
      root_dir = marker and vim.fs.dirname(marker) or vim.fs.dirname(file),
      -- Editor settings override the project's latchwatch.toml (keys in editor-configs/README.md).
      init_options = { latchwatch = { debounce = 500, runOn = "change" } },
      settings = { latchwatch = {} },
    })
  end,
})
