-- latchwatch for Neovim 0.7 (before vim.lsp.start existed): one client per root folder,
-- attached with vim.lsp.buf_attach_client. Load it the same way as latchwatch.lua.
local clients = {}

local function root_of(file)
  local dir = vim.fn.fnamemodify(file, ":p:h")
  while true do
    for _, marker in ipairs({ "latchwatch.toml", "pyproject.toml", ".git" }) do
      if vim.loop.fs_stat(dir .. "/" .. marker) then
        return dir
      end
    end
    local parent = vim.fn.fnamemodify(dir, ":h")
    if parent == dir then
      return vim.fn.fnamemodify(file, ":p:h")
    end
    dir = parent
  end
end

vim.api.nvim_create_augroup("latchwatch", { clear = true })
vim.api.nvim_create_autocmd("FileType", {
  group = "latchwatch",
  pattern = "python",
  callback = function(args)
    local file = vim.api.nvim_buf_get_name(args.buf)
    if file == "" then
      return
    end
    local root = root_of(file)
    if not clients[root] or vim.lsp.client_is_stopped(clients[root]) then
      clients[root] = vim.lsp.start_client({
        name = "latchwatch",
        cmd = { "latchwatch", "serve" },
        root_dir = root,
        init_options = { latchwatch = { debounce = 500, runOn = "change" } },
        settings = { latchwatch = {} },
      })
    end
    vim.lsp.buf_attach_client(args.buf, clients[root])
  end,
})
